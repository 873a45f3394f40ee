"""The ``headlight`` command: the window, and headless commands that give the same numbers.

Exit status: 0 success, 1 a check failed, 2 bad input (a one-line message on stderr).
Heavy libraries (torch, transformers, Qt) are imported inside the commands that need them, so
``headlight --help`` and argument errors answer at once.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path

from viewer import __version__
from viewer.errors import HeadlightError

DEFAULT_CHECK_TEXT = (
    "The mechanic at the co-op trued the rear wheel, then she checked the brake cables twice."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, as for every bad input
        self.exit(2, f"headlight: error: {message} (see headlight --help)\n")


def write_json(path: str | Path, data: dict) -> None:
    """Write JSON atomically: a temporary file in the same folder, then a rename."""
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise HeadlightError(f"cannot write {path}: folder {folder} does not exist")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=folder)
    except OSError as exc:
        raise HeadlightError(f"cannot write {path}: {exc.strerror}") from None
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, sort_keys=False)
            fh.write("\n")
        os.replace(tmp, path)
    except OSError as exc:
        Path(tmp).unlink(missing_ok=True)
        raise HeadlightError(f"cannot write {path}: {exc.strerror}") from None


def _texts(args: argparse.Namespace, default: str | None = None) -> list[str]:
    from viewer.reports.textsets import load_text_set

    if getattr(args, "text", None) and getattr(args, "texts", None):
        raise HeadlightError("give either --text or --texts, not both")
    if getattr(args, "texts", None):
        return [item.text for item in load_text_set(args.texts)]
    if getattr(args, "text", None):
        return [args.text]
    if default is None:
        raise HeadlightError("no text given; use --text or --texts")
    return [default]


def _open(args: argparse.Namespace):
    from viewer.model.loader import open_model

    return open_model(args.model, allow_pickle=getattr(args, "allow_pickle", False))


# -- commands --------------------------------------------------------------------------------


def cmd_check(args: argparse.Namespace) -> int:
    from viewer.core.attention import check_recordings

    if not (args.tolerance > 0):
        raise HeadlightError(f"--tolerance must be positive, got {args.tolerance}")
    texts = _texts(args, DEFAULT_CHECK_TEXT)
    loaded = _open(args)
    result = check_recordings(loaded.record_many(texts, batch_size=8), args.tolerance)
    data = {"model": str(loaded.folder), "family": loaded.family.name, **result.to_dict()}
    print(f"re-derivation check: {loaded.family.name} · {loaded.n_layers} layers × "
          f"{loaded.n_heads} heads · {result.texts} text(s)")
    print(f"{'layer':>5}  {'max abs error':>13}")
    for row in data["layers"]:
        print(f"{row['layer']:>5}  {row['max_abs_error']:>13.3e}")
    verdict = "passed" if result.passed else "FAILED"
    print(f"{verdict}: max abs error {result.max_abs_error:.3e} (tolerance {args.tolerance:g})")
    if args.json:
        write_json(args.json, data)
    return 0 if result.passed else 1


def cmd_window(args: argparse.Namespace) -> int:
    from viewer.gui.app import run_window  # Qt is imported only here

    return run_window(model=args.model, text=args.text)


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="headlight",
        description="Inspect attention inside small transformer checkpoints, offline, with "
        "every number checked against the model's own computation.",
    )
    parser.add_argument("--version", action="version", version=f"headlight {__version__}")
    parser.add_argument("--model", help="model folder to open in the window (default: demo)")
    parser.add_argument("--text", help="text to run when the window opens")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)

    def model_command(name: str, help_text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument("model", metavar="DIR", help="local model folder")
        p.add_argument("--allow-pickle", action="store_true",
                       help="accept pickle weights (loaded with weights_only=True)")
        p.add_argument("--json", metavar="FILE", help="also write the result as JSON")
        return p

    p = model_command("check", "re-derive attention from the captured Q/K for every layer and "
                      "head and compare with the model's own probabilities")
    p.add_argument("--text", help="text to check (default: a built-in sentence)")
    p.add_argument("--texts", metavar="FILE", help="text set (.txt, .jsonl, .csv)")
    p.add_argument("--tolerance", type=float, default=1e-5, help="max abs error (default 1e-5)")
    p.set_defaults(func=cmd_check)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    func = getattr(args, "func", cmd_window)
    try:
        return int(func(args) or 0)
    except HeadlightError as exc:
        print(f"headlight: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("headlight: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
