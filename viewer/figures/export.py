"""Figures and data to files: PNG (300 dpi), SVG and PDF, CSV and JSON, written atomically.

Exports are reproducible: the SVG ids are salted with a fixed string and no creation date is
embedded in SVG or PDF, so two exports of the same figure are byte-identical.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import matplotlib as mpl
from matplotlib.figure import Figure

from viewer.files import atomic_write_bytes, atomic_write_text, write_json

FIGURE_FORMATS = ("png", "svg", "pdf")
PRINT_DPI = 300
PRINT_SIZE = (7.0, 4.2)  # inches: fits a model card page column at print resolution

_METADATA = {
    "png": {"Software": "Headlight (matplotlib)"},
    "svg": {"Date": None, "Creator": "Headlight (matplotlib)"},
    "pdf": {"CreationDate": None, "ModDate": None, "Creator": "Headlight (matplotlib)"},
}


def figure_bytes(fig: Figure, fmt: str, dpi: int = PRINT_DPI) -> bytes:
    """The figure encoded as `fmt` (png, svg or pdf), without time stamps."""
    if fmt not in FIGURE_FORMATS:
        raise ValueError(f"unknown figure format {fmt!r}")
    buf = io.BytesIO()
    with mpl.rc_context({"svg.hashsalt": "headlight", "svg.fonttype": "path"}):
        fig.savefig(buf, format=fmt, dpi=dpi, metadata=_METADATA[fmt], facecolor="white")
    return buf.getvalue()


def save_figure(
    fig: Figure,
    stem: str | Path,
    formats: Sequence[str] = FIGURE_FORMATS,
    *,
    dpi: int = PRINT_DPI,
    force: bool = True,
) -> list[Path]:
    """Write `fig` as stem.png / stem.svg / stem.pdf; returns the paths written."""
    stem = Path(stem)
    return [
        atomic_write_bytes(stem.with_suffix(f".{fmt}"), figure_bytes(fig, fmt, dpi), force=force)
        for fmt in formats
    ]


def save_rows(
    path: str | Path, header: Sequence[str], rows: Iterable[Sequence[Any]], *, force: bool = True
) -> Path:
    """A CSV table (UTF-8, header row first)."""
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return atomic_write_text(path, buf.getvalue(), force=force)


def save_data(
    stem: str | Path, data: dict, header: Sequence[str], rows: Iterable[Sequence[Any]], *, force: bool = True
) -> list[Path]:
    """A pane's data as stem.json (everything) and stem.csv (the table)."""
    stem = Path(stem)
    return [
        write_json(stem.with_suffix(".json"), data, force=force),
        save_rows(stem.with_suffix(".csv"), header, rows, force=force),
    ]


def grid_rows(grid: Sequence[Sequence[float]]) -> list[list[Any]]:
    """(L, H) values as CSV rows: layer, head, value (layers and heads counted from 0)."""
    return [[layer, head, value] for layer, row in enumerate(grid) for head, value in enumerate(row)]
