"""``python -m viewer`` runs the ``headlight`` command."""

import sys

from viewer.cli import main

sys.exit(main())
