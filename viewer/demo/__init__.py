"""The embedded demo: the Northgate Cycle Co-op message classifier (see ``model/MODEL.md``).

``python -m viewer.demo.build`` rebuilds it from the seeded generator in ``generate.py``.
"""

from pathlib import Path

MODEL_DIR = Path(__file__).resolve().parent / "model"
