"""Import matplotlib and the figure builders off the GUI thread, before any model work.

``import matplotlib.figure`` alone takes about a second, longer than the window needs to
appear. The window therefore hands these imports to its worker as the very first job; the
panes create their canvases when it finishes. Running them on the worker (not on a thread of
their own) keeps them from overlapping with the torch import of the first model, so two
threads never load native libraries at the same time.
"""

from __future__ import annotations

import importlib
import time
from typing import Any

MODULES = (
    "numpy",
    "matplotlib.figure",
    "matplotlib.backends.backend_qtagg",
    "viewer.figures.pair_grid",
    "viewer.figures.head_map",
    "viewer.figures.links",
    "viewer.figures.evidence",
    "viewer.session.analysis",
    "viewer.session.metrics",
    "viewer.core.shortcuts",
)


def load_figures(ctx: Any) -> float:
    """Job: import the drawing modules; returns the seconds it took."""
    start = time.perf_counter()
    ctx.progress(0, 0, "loading the drawing library…")
    for name in MODULES:
        importlib.import_module(name)
    from viewer.session.jobs import settle_imports

    settle_imports()
    return time.perf_counter() - start
