"""The card's numbers and words: what a model-card section says, assembled from the reports.

The section follows the model-card structure of Mitchell et al. 2019 and contributes to its
*Metrics*, *Evaluation data*, *Quantitative analyses* and *Caveats and recommendations*.
``card_data`` runs the reports; its parts are the very dictionaries the ``check``, ``heads``,
``links``, ``shortcuts`` and ``insert`` commands print, so the card agrees with the commands.
The insertion test runs for the strongest shortcut candidate (the top word or the top two-word
phrase, whichever has the higher Wilson lower bound, inserted as the texts most often write
it). ``card_markdown`` writes ``card.md`` from those numbers and the figures' file names.

The figures are drawn by ``viewer.figures.card``; the folder is written by
``viewer.session.exports.export_card``.
"""

from __future__ import annotations

import datetime as dt
import platform
from collections.abc import Sequence
from importlib import metadata
from pathlib import Path

import numpy as np

from viewer import __version__
from viewer.core.attention import DEFAULT_TOLERANCE
from viewer.core.insertion import POSITION_NAMES
from viewer.core.stats import wilson_interval
from viewer.core.words import contains
from viewer.errors import HeadlightError
from viewer.model.loader import LoadedModel
from viewer.model.names import HEAD_KIND_NAMES
from viewer.reports.cue import strongest_candidate
from viewer.reports.evidence import ROW_LABELS, ROW_TITLES, ROWS, evidence_for
from viewer.reports.heads import predicts
from viewer.reports.predictions import accuracy_data, set_labels
from viewer.reports.runfolder import input_digest
from viewer.reports.runs import (
    check_data,
    heads_data,
    insertion_data,
    links_data,
    predictions_data,
    shortcuts_data,
)
from viewer.reports.shards import SERIAL, RunOptions
from viewer.reports.textsets import TextItem, TextSource, as_source, load_text_set

LIBRARIES = ("torch", "transformers", "tokenizers", "numpy", "scipy", "matplotlib", "safetensors")

CAUTIONS = (
    "Attention is not by itself an explanation: a head attending to a token does not show that "
    "the prediction depends on it (Jain & Wallace 2019). Read the attention figures beside the "
    "knockout and gradient evidence, and trust the counterfactual numbers when they disagree.",
    "Headlight does not certify this model as safe or fair. These analyses look for specific "
    "problems on the texts given; finding none is not evidence that there are none.",
    "Decisions about deploying this model follow the team's own review process; the numbers "
    "here are inputs to that review, not a verdict.",
)


def versions() -> dict[str, str]:
    out = {"headlight": __version__, "python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _fmt(x: float | None, digits: int = 3) -> str:
    return "–" if x is None or not np.isfinite(x) else f"{x:.{digits}f}"


def example_text(
    labels: Sequence[str], items: Sequence[TextItem], shortcuts: dict | None, predicted: list[int] | None
) -> str | None:
    """A text to show the evidence strip for: one containing the strongest shortcut word,
    preferably one the model gets wrong (labelled, predicted otherwise); else the first text."""
    if not items:
        return None
    if not (shortcuts and shortcuts["tokens"]):
        return items[0].text
    word = shortcuts["tokens"][0]["token"]
    having = [k for k, item in enumerate(items) if contains(item.text, word)]
    if predicted is not None and labels:
        for k in having:
            label = items[k].label
            if label is not None and label != labels[predicted[k]]:
                return items[k].text
    return items[having[0]].text if having else items[0].text


def by_class_counts(labels: Sequence[str], row: dict) -> np.ndarray:
    """A shortcut row's per-class breakdown as (classes, 2): texts holding it, flips."""
    return np.array([[row["by_class"][c]["count"], row["by_class"][c]["flips"]] for c in labels], np.int64)


def _insertion(
    loaded: LoadedModel,
    source: TextSource,
    items: Sequence[TextItem],
    shortcuts: dict,
    *,
    batch_size: int,
    quiet: bool,
    run: RunOptions,
) -> dict | None:
    """``headlight insert`` for the strongest candidate, or why it was not run. The class it
    points to is read off the shortcut search's own per-class breakdown of the candidate."""
    from viewer.reports.insertion import insertion_phrase

    best = strongest_candidate(shortcuts)
    if best is None:
        return None
    phrase = insertion_phrase(items, best["token"])
    try:
        return insertion_data(
            loaded,
            source,
            phrase,
            batch_size=batch_size,
            quiet=quiet,
            run=run,
            by_class=by_class_counts(loaded.labels, best),
        )
    except HeadlightError as e:
        return {"phrase": phrase, "not_run": str(e)}


def _search_mode(sc: dict) -> str:
    """Which shortcut search ran, for the card (docs/definitions.md, "Screen and confirmation")."""
    if sc.get("mode") == "screened":
        return (
            f"Screened search: {sc['screened']} words and phrases scored by gradient × input, "
            f"association and attention focus, {sc['confirmed']} candidates confirmed by knockout; "
            "a word that is not a candidate is not ranked"
        )
    return "Exhaustive search: every word and phrase of every text knocked out"


def card_data(
    loaded: LoadedModel,
    texts: Path | TextSource,
    pairs_path: Path | None,
    *,
    batch_size: int = 16,
    quiet: bool = False,
    run: RunOptions = SERIAL,
) -> dict:
    """All numbers of a card, computed by the same runs as the commands."""
    source = as_source(texts)
    items = load_text_set(source)
    data: dict = {
        "model": {
            "name": loaded.display_name,  # as the window's model line names it
            "folder": loaded.name,
            "family": loaded.family.name,
            "layers": loaded.n_layers,
            "heads": loaded.n_heads,
            "head_kind": loaded.head_kind,
            "labels": list(loaded.labels),
        },
        "evaluation_data": {
            "texts_file": source.name,
            "texts": len(items),
            "labelled": sum(i.label is not None for i in items),
        },
        "check": check_data(loaded, source, DEFAULT_TOLERANCE, run=run),
        "heads": heads_data(loaded, source, batch_size=batch_size, quiet=quiet, run=run),
    }
    if pairs_path is not None:
        data["links"] = links_data(loaded, pairs_path, batch_size=batch_size, quiet=quiet, run=run)
        add_link_intervals(data["links"])
        data["evaluation_data"]["pairs_file"] = pairs_path.name
        data["evaluation_data"]["pairs"] = data["links"]["pairs"]
    if predicts(loaded):
        data["shortcuts"] = shortcuts_data(loaded, source, batch_size=batch_size, quiet=quiet, run=run)
        predicted = None
        if loaded.head_kind == "classifier":
            insertion = _insertion(
                loaded, source, items, data["shortcuts"], batch_size=batch_size, quiet=quiet, run=run
            )
            if insertion is not None:
                data["insertion"] = insertion
            scan = predictions_data(loaded, source, batch_size=batch_size, quiet=quiet, run=run)
            predicted = [r.predicted for r in scan.rows]
            data["accuracy"] = accuracy_data(loaded.labels, set_labels(loaded, items), predicted)
        example = example_text(loaded.labels, items, data["shortcuts"], predicted)
        if example is not None:
            data["example"] = evidence_for(loaded, example).to_dict()
    for part in ("check", "heads", "links", "shortcuts", "insertion"):
        if part in data:
            data[part].pop("model", None)  # the folder path is machine-specific; see "model"
    return data


def add_link_intervals(links: dict) -> None:
    """The best head's and the nearest baseline's pairs right, with the 95% Wilson score
    interval of each share (Wilson 1927; ``viewer.core.stats.wilson_interval``)."""
    n = int(links["pairs"])
    for part, share in ((links["best"], links["best"]["accuracy"]), (links, links["nearest_baseline"])):
        name = "nearest_baseline_" if part is links else ""
        if share is None or not n:
            continue
        k = int(round(share * n))
        part[f"{name}correct"] = k
        part[f"{name}wilson_95"] = list(wilson_interval(k, n))


def reproducibility(
    loaded: LoadedModel, source: TextSource, pairs_path: Path | None, command: Sequence[str], date: str | None
) -> dict:
    """SHA-256 of every input file, library versions, the command and the date (UTC)."""
    inputs = [*loaded.weight_files, source.path] + ([pairs_path] if pairs_path else [])
    return {
        "sha256": {p.name: input_digest(p) for p in inputs},
        "versions": versions(),
        "command": " ".join(command) if command else "(called from Python)",
        "date": date or dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
    }


def _by_class(row: dict) -> str:
    """ "billing 52/56, repair 0/2": flips of the texts holding the word, per originally
    predicted class that has any."""
    parts = [
        f"{label} {c['flips']}/{c['count']}" for label, c in (row.get("by_class") or {}).items() if c["count"]
    ]
    return ", ".join(parts) or "–"


def _insertion_line(ins: dict) -> str:
    """The Metrics line of the insertion test (the end position first, then the others)."""
    if "not_run" in ins:
        return f"- Insertion test of “{ins['phrase']}” not run: {ins['not_run']}"
    rows = {r["position"]: r for r in ins["positions"]}
    tried = ins["texts"] - ins["skipped"]
    if not tried:
        return (
            f"- Insertion test of “{ins['phrase']}”: every text is already predicted "
            f"{ins['class']}, so there was nothing to flip."
        )
    end = rows.get("end") or next(iter(rows.values()))
    others = [
        f"{POSITION_NAMES.get(p, p)} {r['flips']} of {r['tried']} (95% low {_fmt(r['flip_low'])})"
        for p, r in rows.items()
        if r is not end and r["tried"]
    ]
    where = POSITION_NAMES.get(end["position"], end["position"])
    line = (
        f"- Insertion test: inserting “{ins['phrase']}” {where} of the {end['tried']} "
        f"texts not predicted {ins['class']} flips {end['flips']} to {ins['class']} "
        f"(95% Wilson low {_fmt(end['flip_low'])})"
    )
    return line + (f"; {'; '.join(others)}." if others else ".")


EVIDENCE_SOURCES = {
    "attention": "the model's own attention weights from the summary token",
    "rollout": "Abnar & Zuidema 2020",
    "flow": "Abnar & Zuidema 2020",
    "value_norm": "Kobayashi et al. 2020",
    "grad_input": "Shrikumar et al. 2016",  # from memory: "Not Just a Black Box", arXiv 1605.01713
    "integrated_gradients": "Sundararajan et al. 2017",
    "knockout": "the token deleted from the input and the model run again",
}
"""Where each row of the evidence strip comes from, for the card's caption."""


def _model_name(m: dict) -> str:
    """The model as the window names it (its own model card's name), with its folder."""
    name = m.get("name") or m["folder"]
    return f"**{name}**" + (f" (folder `{m['folder']}`)" if name != m["folder"] else "")


def _links_line(links: dict) -> str:
    b = links["best"]
    line = f"- Link accuracy: best head layer {b['layer']} · head {b['head']} at {_fmt(b['accuracy'])}"
    if "wilson_95" in b:
        lo, hi = b["wilson_95"]
        line += (
            f" ({b['correct']} of {links['pairs']} pairs; 95% Wilson score interval "
            f"{_fmt(lo)}–{_fmt(hi)}, Wilson 1927)"
        )
    line += f"; nearest-candidate baseline {_fmt(links['nearest_baseline'])}"
    if "nearest_baseline_wilson_95" in links:
        lo, hi = links["nearest_baseline_wilson_95"]
        line += f" (95% Wilson {_fmt(lo)}–{_fmt(hi)})"
    return line + "."


def accuracy_table(acc: dict, cue: dict | None) -> list[str]:
    """Per-class accuracy and the confusion matrix (docs/definitions.md, "Accuracy"), with
    the accuracy with the cue removed and inserted beside it (docs/definitions.md, "Cue
    accuracy") when the shortcut search found one."""
    order = acc["confusion_order"]
    extra = ("cue removed", "cue inserted") if cue else ()
    head = ["label", "texts", "accuracy", *extra, *(f"predicted {c}" for c in order)]
    lines = [
        "Accuracy per class and confusion matrix on the labelled texts (rows: the label; "
        "“predicted” columns: texts of that label predicted as each class)"
        + (f"; beside it, the accuracy with the cue “{cue['cue']}” removed and inserted." if cue else "."),
        "",
        "| " + " | ".join(head) + " |",
        "|---|" + "---:|" * (len(head) - 1),
    ]
    for a, label in enumerate(order):
        pc = acc["per_class"][label]
        cells = [label, str(pc["texts"]), _fmt(pc["accuracy"])]
        if cue:
            cells += [_fmt(cue[v]["per_class"][label]["accuracy"]) for v in ("removed", "inserted")]
        cells += [str(n) for n in acc["confusion"][a]]
        lines.append("| " + " | ".join(cells) + " |")
    total = ["all", str(acc["labelled"]), _fmt(acc["accuracy"])]
    if cue:
        total += [_fmt(cue[v]["accuracy"]) for v in ("removed", "inserted")]
    lines += ["| " + " | ".join(total + [""] * len(order)) + " |", ""]
    return lines


def evidence_caption(ex: dict, figure: str) -> list[str]:
    """The evidence strip's figure with its text quoted, every row's source, how to read the
    colours, and the rank agreements (or why they are withheld)."""
    text = " ".join(ex["text"].split())
    rows = [k for k in ROWS if any(v is not None for v in ex["rows"][k])]
    sources = "; ".join(f"*{ROW_LABELS[k]}* — {ROW_TITLES[k]}, {EVIDENCE_SOURCES[k]}" for k in rows)
    agreement = ex["agreement_with_knockout"]
    if agreement:
        rho = "Rank agreement with knockout (Spearman ρ, written at the right of each row): " + ", ".join(
            f"{ROW_LABELS[k]} {_fmt(v, 2)}" for k, v in agreement.items()
        )
    elif ex.get("agreement_withheld"):
        rho = f"Rank agreements are withheld: {ex['agreement_withheld']}"
    else:
        rho = "No rank agreement: there is no knockout row"
    return [
        f"![Evidence strip for one text]({figure})",
        "",
        f"Per-token evidence for this text (predicted: {ex['target_label']}):",
        "",
        f"> {text}",
        "",
        f"Rows: {sources}. Each row is scaled to its own largest absolute value, so colours "
        "compare tokens within a row, not across rows; the bars at the right are the class "
        f"probabilities, the predicted class filled. {rho}.",
        "",
    ]


def _cue_sentence(cue: dict) -> str:
    """Accuracy with the strongest candidate removed and inserted (docs/definitions.md, "Cue
    accuracy"), beside the accuracy as given."""
    g, r, i = cue["given"], cue["removed"], cue["inserted"]
    others = g["labelled"] - cue["texts_with_cue"]
    return (
        f"Accuracy with the cue “{cue['cue']}” removed from the {cue['texts_with_cue']} texts "
        f"holding it: {_fmt(r['accuracy'])} ({r['correct']} of {r['labelled']}); with it "
        f"inserted at the end of the other {others}: {_fmt(i['accuracy'])} "
        f"({i['correct']} of {i['labelled']}); as given: {_fmt(g['accuracy'])}."
    )


def card_markdown(data: dict, figures: dict[str, str]) -> str:
    """``card.md``: the numbers of ``data`` in words and tables, with the figures of ``figures``
    (name -> path of its PNG inside the card folder)."""
    m, ev, chk, heads = data["model"], data["evaluation_data"], data["check"], data["heads"]
    lines = [
        "## Attention inspection (Headlight)",
        "",
        "*This section contributes to the Metrics, Evaluation data, Quantitative analyses "
        "and Caveats and recommendations of the model card (Mitchell et al. 2019).*",
        "",
    ]
    classes = f" with classes {', '.join(m['labels'])}" if m["labels"] else ""
    lines += [
        "### What was inspected",
        "",
        f"- Model: {_model_name(m)}, {m['family']} family, {m['layers']} layers × "
        f"{m['heads']} heads, {HEAD_KIND_NAMES[m['head_kind']]}{classes}.",
        f"- Evaluation data: `{ev['texts_file']}`, {ev['texts']} texts ({ev['labelled']} labelled).",
    ]
    if "pairs_file" in ev:
        lines.append(f"- Link pairs: `{ev['pairs_file']}`, {ev['pairs']} pairs.")
    lines += ["- Layers and heads are counted from 0.", "", "### Metrics", ""]
    verdict = "passed" if chk["passed"] else "FAILED"
    lines.append(
        f"- Re-derivation check {verdict}: attention recomputed from the captured "
        f"queries and keys matches the model's own probabilities to a max absolute "
        f"error of {chk['max_abs_error']:.1e} over {chk['texts']} texts "
        f"(tolerance {chk['tolerance']:g})."
    )
    acc = data.get("accuracy")
    if acc and acc.get("labelled"):
        lines.append(
            f"- Accuracy on the labelled texts: {_fmt(acc['accuracy'])} "
            f"({acc['correct']} of {acc['labelled']})."
        )
    cue = (data.get("shortcuts") or {}).get("cue_accuracy")
    if cue:
        lines.append(f"- {_cue_sentence(cue)}")
    if "links" in data:
        lines.append(_links_line(data["links"]))
    sc = data.get("shortcuts")
    if sc and (not sc["tokens"] or sc["tokens"][0]["flip_rate"] == 0):
        lines.append(
            "- Shortcut search: knocking out no single word seen in at least 3 texts changed a prediction."
        )
    elif sc:
        t = strongest_candidate(sc) or sc["tokens"][0]
        what = "the two-word phrase " if t is not sc["tokens"][0] else ""
        line = (
            f"- Strongest shortcut candidate: {what}“{t['token']}” — knocking it out flips "
            f"the prediction in {_fmt(100 * t['flip_rate'], 0)}% of the {t['count']} "
            f"texts containing it (95% Wilson lower bound {_fmt(t['flip_low'])})."
        )
        if what:
            w = sc["tokens"][0]
            line += (
                f" The strongest single word is “{w['token']}” "
                f"({_fmt(100 * w['flip_rate'], 0)}% of {w['count']}, lower bound "
                f"{_fmt(w['flip_low'])})."
            )
        lines.append(line)
    ins = data.get("insertion")
    if ins:
        lines.append(_insertion_line(ins))
    lines += ["", "### Quantitative analyses", ""]
    if acc and acc.get("labelled"):
        lines += accuracy_table(acc, cue)
    lines += [
        f"![Head map of mean attention entropy]({figures['head_entropy']})",
        "",
        "Mean attention entropy per head (rows: layers, columns: heads, both from 0), "
        "normalised by the log of the number of visible keys (0: all weight on one key; 1: "
        "uniform); the colour bar gives the scale.",
        "",
    ]
    if "head_importance" in figures:
        lines += [
            f"![Head importance]({figures['head_importance']})",
            "",
            "Head importance (Michel et al. 2019, Eq. 2): mean |∂L/∂ξ_h| of the "
            f"cross-entropy against the {heads['importance_targets']}, unit ℓ2 norm per "
            "layer.",
            "",
        ]
    if "links" in data:
        links = data["links"]
        accs = np.asarray(links["accuracy"], dtype=float)
        lines += [
            f"![Link accuracy per head]({figures['link_accuracy']})",
            "",
            f"Link accuracy per head over {links['pairs']} link pairs: each cell is the share of "
            "pairs whose target the head scores above every distractor; the orange line on the "
            "colour bar marks the nearest-candidate baseline.",
            "",
            "| layer | best head | link accuracy |",
            "|---:|---:|---:|",
        ]
        for layer, row in enumerate(accs):
            h = int(np.nanargmax(row))
            lines.append(f"| {layer} | {h} | {_fmt(row[h])} |")
        lines += [f"| nearest-candidate baseline | | {_fmt(links['nearest_baseline'])} |", ""]
    if sc:
        lines += [
            f"Shortcut search by word knockout over {sc['texts']} texts (words seen in at "
            "least 3 texts, ranked by the lower end of the 95% Wilson interval of the flip "
            f"rate). {_search_mode(sc)}:",
            "",
            "| word | texts | flip rate | flip rate, 95% low | mean drop | focus | "
            "flips / texts by predicted class |",
            "|---|---:|---:|---:|---:|---:|---|",
        ]
        for r in sc["tokens"][:10]:
            lines.append(
                f"| {r['token']} | {r['count']} | {_fmt(r['flip_rate'])} | "
                f"{_fmt(r['flip_low'])} | {_fmt(r['mean_drop'])} | {_fmt(r['focus'])} | "
                f"{_by_class(r)} |"
            )
        if sc["phrases"]:
            lines += [
                "",
                "| two-word phrase | texts | flip rate | 95% low | mean drop |",
                "|---|---:|---:|---:|---:|",
            ]
            for r in sc["phrases"][:5]:
                lines.append(
                    f"| {r['token']} | {r['count']} | {_fmt(r['flip_rate'])} | "
                    f"{_fmt(r['flip_low'])} | {_fmt(r['mean_drop'])} |"
                )
        lines.append("")
    if "fixation" in figures:
        lines += [
            f"![Fixation plot]({figures['fixation']})",
            "",
            "Fixation plot: one dot per word seen in at least 3 texts, at the summary token's "
            "last-layer attention share (head mean) and the mean drop in the predicted class's "
            "probability when the word is knocked out; a dot's area grows with the number of "
            "texts the word occurs in. The dashed lines are the medians of the two axes. Upper "
            "left: ignored but decisive; lower right: attended but harmless.",
            "",
        ]
    if "insertion" in figures:
        lines += [
            f"![Insertion test]({figures['insertion']})",
            "",
            f"Insertion test of “{ins['phrase']}”: one bar per insertion point (start, end, a "
            "random word boundary), its length the share of texts not predicted "
            f"{ins['class']} that flip into {ins['class']}, the line across its end the 95% "
            "Wilson score interval (Wilson 1927), its label the flips of the texts tried.",
            "",
        ]
    if "evidence_example" in figures:
        lines += evidence_caption(data["example"], figures["evidence_example"])
    lines += ["### Caveats and recommendations", ""]
    lines += [f"- {c}" for c in CAUTIONS]
    if sc and sc["tokens"] and sc["tokens"][0]["flip_low"] > 0.2:
        t = sc["tokens"][0]
        lines.append(
            f"- The predictions depend strongly on “{t['token']}”. Check whether this "
            "word carries the meaning of the class or only correlates with it in the "
            "training data, and test on texts where it appears with other classes."
        )
    ins = data.get("insertion")
    end = next((r for r in (ins or {}).get("positions", []) if r["position"] == "end"), None)
    if end and end["tried"] and end["flip_low"] > 0.5:
        lines.append(
            f"- “{ins['phrase']}” alone moves most texts of other classes into "
            f"{ins['class']}: the model treats it as sufficient for that class. Texts "
            "that carry it for another reason will be misclassified."
        )
    rep = data["reproducibility"]
    lines += ["", "### Reproducibility", "", "| item | value |", "|---|---|"]
    for name, digest in rep["sha256"].items():
        lines.append(f"| SHA-256 of `{name}` | `{digest}` |")
    lines += [f"| {k} | {v} |" for k, v in rep["versions"].items()]
    lines += [f"| command | `{rep['command']}` |", f"| date | {rep['date']} |", ""]
    return "\n".join(lines)
