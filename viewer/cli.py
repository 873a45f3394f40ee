"""The ``headlight`` command: the window, and headless commands that give the same numbers.

Exit status: 0 success, 1 a check failed, 2 bad input (a one-line message on stderr).
Heavy libraries (torch, transformers, Qt) are imported inside the commands that need them, so
``headlight --help`` and argument errors answer at once.

``--json FILE`` means the same in every command: also write the command's numbers (for
``card``, those of ``card.json``) to FILE. It is checked before anything is computed: its
folder must exist and be writable, and it must be none of the command's inputs (text set,
link pairs, model, adapter and base folders, the card folder) nor lie inside an input folder.
A text given on the command line (``--text``, ``--word``) must not be empty and must be
Unicode text.
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from viewer import __version__
from viewer.core.attention import DEFAULT_TOLERANCE
from viewer.errors import HeadlightError
from viewer.files import atomic_write_bytes, check_output, write_json
from viewer.reports.shards import SHARD_SIZE

DEMO = "demo"  # as a model folder: the embedded demo model (write ./demo for a folder of that name)
DEFAULT_CHECK_TEXT = (
    "The mechanic at the co-op trued the rear wheel, then she checked the brake cables twice."
)


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, as for every bad input
        self.exit(2, f"headlight: error: {message} (see headlight --help)\n")


def _source(args: argparse.Namespace):
    """The text set of ``--texts`` with its read options (split, columns)."""
    from viewer.reports.textsets import TextSource

    return TextSource(
        Path(args.texts), split=args.split, text_column=args.text_column, label_column=args.label_column
    )


def _survey(args: argparse.Namespace):
    """The text set of ``--texts``, read once so that bad input is reported before the model
    is opened."""
    from viewer.reports.textsets import survey

    source = _source(args)
    survey(source)
    return source


def cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        return os.cpu_count() or 1


def _run_options(args: argparse.Namespace):
    """Where a set's shards run (``--workers``, ``--cluster``) and the run folder (``--work``)."""
    from viewer.reports.runfolder import default_work_dir
    from viewer.reports.shards import RunOptions

    if args.cluster and args.workers is not None:
        raise HeadlightError(
            "give either --workers or --cluster, not both (a cluster's size is its workers')"
        )
    workers = cores() if args.workers is None else args.workers
    if workers < 1:
        raise HeadlightError(f"--workers must be at least 1, got {workers}")
    if args.shard_size < 1:
        raise HeadlightError(f"--shard-size must be at least 1, got {args.shard_size}")
    work = Path(args.work).expanduser() if args.work else default_work_dir()
    return RunOptions(
        workers=workers, cluster=args.cluster, work=work, fresh=args.fresh, shard_size=args.shard_size
    )


def _open(args: argparse.Namespace):
    from viewer.model.loader import open_model

    loaded = open_model(args.model, base=args.base, allow_pickle=args.allow_pickle)
    if getattr(args, "json", None):  # an adapter's base folder is known now: an input too
        check_output(args.json, [loaded.folder, loaded.base_folder, *loaded.weight_files], "--json")
    loaded.text.limit(getattr(args, "max_tokens", None))
    return loaded


def _print_notes(data: dict) -> None:
    for note in data.get("notes", []):
        print(f"note: {note}")


INPUT_OPTIONS = ("model", "base", "texts", "pairs", "out")


def _check_arguments(args: argparse.Namespace) -> None:
    """What can be checked before any work: texts given on the command line and ``--json``."""
    from viewer.safejson import check_text

    for name in ("text", "word", "knockout_span"):
        value = getattr(args, name, None)
        if value is not None:
            option = "--" + name.replace("_", "-")
            if not value.strip():
                raise HeadlightError(f"{option} is empty; give the {name.replace('_', ' ')} to use")
            check_text(value, option)
    if getattr(args, "json", None):
        check_output(args.json, [getattr(args, n, None) for n in INPUT_OPTIONS], "--json")
    if getattr(args, "command", None) and getattr(args, "model", None):
        from viewer.model.folders import check_folder

        # every check the loader makes but the config class's: a bad folder is refused in a
        # fraction of a second, before torch is imported (the loader makes them all again)
        check_folder(args.model, args.base, args.allow_pickle)


# -- commands --------------------------------------------------------------------------------


def cmd_check(args: argparse.Namespace) -> int:
    from viewer.reports.runs import check_data

    if args.text is not None and args.texts:
        raise HeadlightError("give either --text or --texts, not both")
    texts = [DEFAULT_CHECK_TEXT if args.text is None else args.text]
    if args.texts:
        texts = _survey(args)
    loaded = _open(args)
    data = check_data(loaded, texts, args.tolerance, run=_run_options(args))
    print(
        f"re-derivation check: {data['family']} · {loaded.n_layers} layers × "
        f"{loaded.n_heads} heads · {data['texts']} text(s)"
    )
    print(f"{'layer':>5}  {'max abs error':>13}")
    for row in data["layers"]:
        print(f"{row['layer']:>5}  {row['max_abs_error']:>13.3e}")
    verdict = "passed" if data["passed"] else "FAILED"
    print(f"{verdict}: max abs error {data['max_abs_error']:.3e} (tolerance {args.tolerance:g})")
    _print_notes(data)
    if args.json:
        write_json(args.json, data)
    return 0 if data["passed"] else 1


def _grid(title: str, grid, fmt: str = "{:6.3f}") -> str:
    """A plain-text layers × heads table."""
    import numpy as np

    a = np.asarray(grid, dtype=float)
    head = "layer " + " ".join(f"{'h' + str(h):>6}" for h in range(a.shape[1]))
    rows = [
        f"{layer:>5} " + " ".join(fmt.format(v) if np.isfinite(v) else f"{'-':>6}" for v in a[layer])
        for layer in range(a.shape[0])
    ]
    return "\n".join([title, head, *rows])


def cmd_heads(args: argparse.Namespace) -> int:
    from viewer.reports.runs import heads_data

    source = _survey(args)
    run = _run_options(args)
    loaded = _open(args)
    data = heads_data(
        loaded,
        source,
        batch_size=args.batch_size,
        importance=not args.skip_importance,
        knockout=args.knockout_heads,
        quiet=args.quiet,
        run=run,
    )
    print(_grid("mean entropy (0 = one key, 1 = uniform over the visible keys)", data["entropy"]))
    if "importance" in data:
        print(_grid("head importance (Michel et al. 2019), unit norm per layer", data["importance"]))
    if "knockout_prob_drop" in data:
        print(
            _grid(
                "predicted-class probability drop when the head alone is knocked out",
                data["knockout_prob_drop"],
            )
        )
    _print_notes(data)
    if args.json:
        write_json(args.json, data)
    return 0


def cmd_links(args: argparse.Namespace) -> int:
    from viewer.core.links import read_link_pairs
    from viewer.reports.runs import links_data

    read_link_pairs(args.pairs)  # bad pairs are reported before the model is opened
    run = _run_options(args)
    loaded = _open(args)
    data = links_data(loaded, args.pairs, batch_size=args.batch_size, quiet=args.quiet, run=run)
    print(
        _grid(
            f"link accuracy over {data['pairs']} pairs (target strictly above every distractor)",
            data["accuracy"],
        )
    )
    best = data["best"]
    print(
        f"best head: layer {best['layer']} · head {best['head']} accuracy {best['accuracy']:.3f}"
        f"; nearest-candidate baseline {data['nearest_baseline']:.3f}"
    )
    _print_notes(data)
    if args.json:
        write_json(args.json, data)
    return 0


def cmd_shortcuts(args: argparse.Namespace) -> int:
    from viewer.reports.runs import search_mode, shortcuts_data

    source = _survey(args)
    run = _run_options(args)
    loaded = _open(args)
    data = shortcuts_data(
        loaded,
        source,
        batch_size=args.batch_size,
        phrases=not args.no_phrases,
        exhaustive=args.exhaustive,
        share=args.confirm_share,
        quiet=args.quiet,
        run=run,
    )
    print(search_mode(data))
    for title, rows in (("words", data["tokens"]), ("two-word phrases", data["phrases"])):
        if title != "words" and args.no_phrases:
            continue
        if not rows:
            print(
                f"shortcut search, {title}: none is seen in 3 or more of the {data['texts']} texts, "
                "the fewest the search ranks; give a larger set"
            )
            continue
        print(f"shortcut search, {title} (seen in >= 3 of {data['texts']} texts), strongest first")
        name = "word" if title == "words" else "phrase"
        print(f"{name:<24} {'count':>6} {'flip rate':>9} {'flip low':>8} {'mean drop':>9} {'focus':>6}")
        for r in rows[: args.top]:
            print(
                f"{r['token'][:24]:<24} {r['count']:>6} {r['flip_rate']:>9.3f} "
                f"{r['flip_low']:>8.3f} {r['mean_drop']:>9.3f} {r['focus']:>6.3f}"
            )
    _print_notes(data)
    if data.get("cue_accuracy"):
        from viewer.reports.cue import cue_line

        print(cue_line(data["cue_accuracy"]))
    if args.json:
        write_json(args.json, data)
    return 0


def cmd_insert(args: argparse.Namespace) -> int:
    from viewer.reports.insertion import heads_text, parse_heads
    from viewer.reports.runs import insertion_data

    source = _survey(args)
    run = _run_options(args)
    loaded = _open(args)
    heads = parse_heads(args.knockout_heads, loaded.n_layers, loaded.n_heads) if args.knockout_heads else ()
    data = insertion_data(
        loaded,
        source,
        args.word,
        target=args.target,
        seed=args.seed,
        batch_size=args.batch_size,
        quiet=args.quiet,
        run=run,
        heads=heads,
    )
    how = "given" if data["class_chosen_by"] == "given" else "by knockout"
    print(
        f"insertion test: '{data['phrase']}' into texts not predicted {data['class']} "
        f"(class {how}); {data['skipped']} of {data['texts']} texts already are"
    )
    print(
        f"{'position':<9} {'tried':>6} {'flips':>6} {'flip rate':>9} {'95% low':>8} "
        f"{'95% high':>8} {'mean gain':>9}"
    )
    for row in data["positions"]:
        if not row["tried"]:
            print(f"{row['position']:<9} {0:>6}")
            continue
        print(
            f"{row['position']:<9} {row['tried']:>6} {row['flips']:>6} {row['flip_rate']:>9.3f} "
            f"{row['flip_low']:>8.3f} {row['flip_high']:>8.3f} {row['mean_gain']:>+9.3f}"
        )
    mech = data.get("knockout_heads")
    if mech:
        print(
            f"mechanism check: the same test with {heads_text(heads)} knocked out; "
            f"{mech['skipped']} of {mech['texts']} texts are then already {data['class']}"
        )
        print(
            f"{'position':<9} {'tried':>6} {'flips':>6} {'flip rate':>9} {'intact':>8} {'share carried':>13}"
        )
        for row in mech["positions"]:
            share = row["share_carried"]
            print(
                f"{row['position']:<9} {row['tried']:>6} {row['flips']:>6} "
                f"{_rate(row['flip_rate']):>9} {_rate(row['intact_flip_rate']):>8} "
                f"{'-' if share is None else f'{share:.0%}':>13}"
            )
    if args.json:
        write_json(args.json, data)
    return 0


def _rate(value: float | None) -> str:
    return "-" if value is None else f"{value:.3f}"


def cmd_evidence(args: argparse.Namespace) -> int:
    from viewer.reports.evidence import ROW_TITLES, ROWS, evidence_for, with_span_of

    loaded = _open(args)
    ev = evidence_for(loaded, args.text, steps=args.steps)
    if args.knockout_span:
        ev = with_span_of(loaded, ev, args.knockout_span)
    data = {"model": str(loaded.folder), **ev.to_dict()}
    if ev.target_label is not None:
        print(f"prediction: {ev.target_label}")
    if ev.probabilities.size:
        print(
            "  "
            + "  ".join(
                f"{lab} {p:.3f}" for lab, p in zip(ev.recording.labels, ev.probabilities, strict=True)
            )
        )
    width = max(len(t) for t in ev.recording.tokens)
    print(f"{'token':<{width}} " + " ".join(f"{k[:10]:>10}" for k in ROWS))
    for i, tok in enumerate(ev.recording.tokens):
        vals = " ".join(f"{ev.rows[k][i]:>10.4f}" for k in ROWS)
        print(f"{tok:<{width}} {vals.replace('nan', '  -')}")
    if ev.agreement:
        print("rank agreement with knockout (Spearman):")
        for row, rho in ev.agreement.items():
            print(f"  {ROW_TITLES[row]:<50} {rho:+.3f}")
    elif ev.withheld:
        print("rank agreement with knockout (Spearman): withheld, see the note")
    if ev.span is not None:
        print(ev.span.line())
    for note in ev.notes:
        print(f"note: {note}")
    if args.json:
        write_json(args.json, data)
    return 0


def cmd_card(args: argparse.Namespace) -> int:
    from viewer.core.links import read_link_pairs
    from viewer.reports.textsets import load_text_set
    from viewer.session.exports import export_card

    out = Path(args.out)
    if out.exists() and not args.force:
        raise HeadlightError(f"{out} already exists; pass --force to replace it")
    source = _source(args)
    load_text_set(source)  # bad inputs are reported before the model is opened
    if args.pairs:
        read_link_pairs(args.pairs)
    run = _run_options(args)
    loaded = _open(args)
    command = ["headlight", *(args.argv or [])]
    export_card(
        loaded,
        source,
        out,
        pairs_path=args.pairs,
        force=args.force,
        command=command,
        batch_size=args.batch_size,
        quiet=args.quiet,
        run=run,
    )
    print(f"card written to {out}/ (card.md, card.json, figures/)")
    if args.json:  # the numbers of the card, as card.json holds them
        atomic_write_bytes(args.json, (out / "card.json").read_bytes())
    return 0


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
    parser.add_argument(
        "--model", help="model folder to open in the window (default, or 'demo': the embedded demo model)"
    )
    parser.add_argument("--text", help="text to run when the window opens")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser)

    def model_command(name: str, help_text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=help_text)
        p.add_argument(
            "model", metavar="DIR", help="local model folder, or 'demo' for the embedded demo model"
        )
        p.add_argument(
            "--allow-pickle",
            action="store_true",
            help="accept pickle weights (loaded with weights_only=True)",
        )
        p.add_argument(
            "--base", metavar="DIR", help="base model folder of an adapter folder (when its own is not local)"
        )
        p.add_argument(
            "--json",
            metavar="FILE",
            help="also write the numbers as JSON (checked before the work: not an input, folder writable)",
        )
        p.add_argument(
            "--max-tokens",
            type=int,
            metavar="N",
            help="cut every text to N tokens (default: what the model reads); said in the output",
        )
        return p

    def run_options(p: argparse.ArgumentParser) -> None:
        g = p.add_argument_group('large sets (README, "Large evaluation sets")')
        g.add_argument(
            "--workers",
            type=int,
            metavar="N",
            help="worker processes on this machine (default: all cores, one torch "
            "thread each; 1 runs in this process)",
        )
        g.add_argument(
            "--cluster",
            metavar="ADDRESS",
            help="run the shards on a Dask cluster, e.g. tcp://10.0.0.5:8786 (the "
            "model folder must be at the same path on every worker)",
        )
        g.add_argument(
            "--work",
            metavar="DIR",
            help="where run folders are kept (default: "
            "$XDG_CACHE_HOME/headlight/runs or ~/.cache/headlight/runs)",
        )
        g.add_argument(
            "--fresh", action="store_true", help="ignore the finished shards of an earlier run and start over"
        )
        g.add_argument(
            "--shard-size",
            type=int,
            default=SHARD_SIZE,
            metavar="N",
            help=f"texts per shard (default {SHARD_SIZE}); part of a run's identity",
        )

    def text_set(p: argparse.ArgumentParser, required: bool = True) -> None:
        p.add_argument(
            "--texts",
            metavar="FILE",
            required=required,
            help="text set: .txt, .jsonl, .csv, .parquet or a folder saved by datasets' save_to_disk",
        )
        p.add_argument("--split", help="split of a saved DatasetDict")
        p.add_argument(
            "--text-column", metavar="NAME", help="column (field) holding the texts (default: text)"
        )
        p.add_argument(
            "--label-column",
            metavar="NAME",
            help="column (field) holding the labels (default: label, when present)",
        )

    p = model_command(
        "check",
        "re-derive attention from the captured Q/K for every layer and "
        "head and compare with the model's own probabilities",
    )
    p.add_argument("--text", help="text to check (default: a built-in sentence)")
    text_set(p, required=False)
    p.add_argument(
        "--tolerance",
        type=float,
        default=DEFAULT_TOLERANCE,
        help=f"max abs error (default {DEFAULT_TOLERANCE:g})",
    )
    run_options(p)
    p.set_defaults(func=cmd_check)

    def set_command(name: str, help_text: str, func) -> argparse.ArgumentParser:
        p = model_command(name, help_text)
        p.add_argument("--batch-size", type=int, default=16, help="texts per batch (default 16)")
        p.add_argument("--quiet", action="store_true", help="no progress bar on stderr")
        run_options(p)
        p.set_defaults(func=func)
        return p

    p = set_command("heads", "head summaries over a text set", cmd_heads)
    text_set(p)
    p.add_argument(
        "--skip-importance", action="store_true", help="leave out head importance (gradients; slower)"
    )
    p.add_argument(
        "--knockout-heads",
        action="store_true",
        help="also knock out each head alone (one pass over the set per head)",
    )
    p = set_command("links", "per-head link accuracy over a link-pairs file", cmd_links)
    p.add_argument("--pairs", metavar="FILE", required=True, help="link pairs (.jsonl)")
    p = set_command("shortcuts", "shortcut search by word knockout over a text set", cmd_shortcuts)
    text_set(p)
    p.add_argument("--no-phrases", action="store_true", help="skip the two-word phrase search")
    p.add_argument("--exhaustive", action="store_true", help="knock out every word of every text (no screen)")
    p.add_argument(
        "--confirm-share",
        type=float,
        default=1 / 16,
        metavar="X",
        help="the screened search knocks out at most this share of what --exhaustive would (default 1/16)",
    )
    p.add_argument("--top", type=int, default=15, help="rows to print (default 15)")
    p = set_command(
        "insert",
        "insertion test: insert a word or phrase into the texts of other "
        "classes and count flips into its class",
        cmd_insert,
    )
    text_set(p)
    p.add_argument("--word", required=True, help="the word or phrase to insert, as written")
    p.add_argument(
        "--class",
        dest="target",
        metavar="C",
        help="the class it should push texts into (default: the class knocking it "
        "out most often flips texts away from)",
    )
    p.add_argument("--seed", type=int, default=0, help="seed of the random insertion points (default 0)")
    p.add_argument(
        "--knockout-heads",
        metavar="L.H,...",
        help="mechanism check: run the test again with these heads knocked out (e.g. 1.2,3.0; 2.* "
        "is all of layer 2) and report the share of the flip rate they carry",
    )
    p = model_command("evidence", "per-token evidence for one prediction (the evidence strip)")
    p.add_argument("--text", required=True, help="the text to explain")
    p.add_argument("--steps", type=int, default=50, help="integrated-gradients steps (default 50)")
    p.add_argument(
        "--knockout-span",
        metavar="PHRASE",
        help="also knock out the tokens of PHRASE's first occurrence in the text together, and "
        "print the drop (for a knockout row too flat to rank, e.g. a whole footer)",
    )
    p.set_defaults(func=cmd_evidence)
    p = set_command("card", "card export: Markdown section, figures and numbers for a model card", cmd_card)
    text_set(p)
    p.add_argument("--pairs", metavar="FILE", help="link pairs (.jsonl)")
    p.add_argument("--out", metavar="FOLDER", required=True, help="folder to create")
    p.add_argument("--force", action="store_true", help="replace an existing folder")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    args.argv = list(sys.argv[1:] if argv is None else argv)
    if getattr(args, "model", None) == DEMO:  # the embedded demo, in every command as in the window
        from viewer.demo import MODEL_DIR

        args.model = str(MODEL_DIR)
    func = getattr(args, "func", cmd_window)
    try:
        _check_arguments(args)
        return int(func(args) or 0)
    except HeadlightError as exc:
        print(f"headlight: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("headlight: interrupted", file=sys.stderr)
        return 130
    finally:
        if "viewer.reports.workers" in sys.modules:  # worker pools and cluster clients
            sys.modules["viewer.reports.workers"].close_engines()


if __name__ == "__main__":
    sys.exit(main())
