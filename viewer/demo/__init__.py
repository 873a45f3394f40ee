"""The embedded demo: the Northgate Cycle Co-op message classifier (see ``model/MODEL.md``).

Only the finished model folder ships with the program; ``python -m scripts.demo.build`` in a
checkout rebuilds it from the seeded message generator.
"""

from pathlib import Path

MODEL_DIR = Path(__file__).resolve().parent / "model"
