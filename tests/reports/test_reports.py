"""Dataset-level reports and their commands: heads, links, shortcuts; bad input."""

from __future__ import annotations

import json
import random
import tracemalloc

import numpy as np
import pytest
import torch

from tests.model import tiny
from viewer.cli import main
from viewer.core.links import find_word, read_link_pairs
from viewer.errors import HeadlightError
from viewer.model.loader import open_model
from viewer.reports.heads import HeadsKind
from viewer.reports.links import link_report
from viewer.reports.shards import run_report
from viewer.reports.shortcuts import shortcut_search
from viewer.reports.textsets import TextItem, load_text_set, read_text_set

WORDS = "the mechanic trued wheel and she replaced chain a member asked about invoice".split()
PAIRS = [
    {
        "text": "the mechanic told the courier that she replaced the chain",
        "source": "she",
        "target": "mechanic",
        "distractors": ["courier"],
    },
    {
        "text": "a member asked the mechanic about the invoice and she paid it",
        "source": "she",
        "target": "member",
        "distractors": ["mechanic"],
    },
    {
        "text": "the courier left the frame at the workshop because it was bent",
        "source": "it",
        "target": "frame",
        "distractors": ["workshop", "courier"],
    },
]


@pytest.fixture(scope="module")
def bert(tmp_path_factory):
    return open_model(tiny.save(tmp_path_factory.mktemp("bert"), "bert"))


def write_jsonl(path, rows):
    path.write_text("".join(json.dumps(r) + "\n" for r in rows), encoding="utf-8")
    return path


def test_links_against_a_brute_force_computation(bert, tmp_path):
    """Reference: the link-score definition of docs/definitions.md ("Link pairs"), computed
    here from recordings, token by token."""
    pairs_file = write_jsonl(tmp_path / "pairs.jsonl", PAIRS)
    acc = link_report(bert, read_link_pairs(pairs_file), batch_size=2)
    correct = np.zeros((bert.n_layers, bert.n_heads))
    for pair in PAIRS:
        rec = bert.record(pair["text"])

        def tokens_of(word, rec=rec, pair=pair):
            a, b = find_word(pair["text"], word)
            return [i for i, (s, e) in enumerate(rec.offsets) if e > s and s < b and e > a]

        src = tokens_of(pair["source"])[0]
        for layer in range(bert.n_layers):
            for head in range(bert.n_heads):
                row = rec.own_probs[layer, head, src]
                target = sum(row[j] for j in tokens_of(pair["target"]))
                others = [sum(row[j] for j in tokens_of(w)) for w in pair["distractors"]]
                correct[layer, head] += all(target > o for o in others)
    np.testing.assert_allclose(acc.accuracy, correct / len(PAIRS))
    assert acc.pairs == 3


# Pairs on which a wrong reading of docs/definitions.md, "Link pairs", changes the numbers on this
# module's tiny BERT. Its attention is close to uniform, so on PAIRS every verdict follows from how
# many sub-tokens each candidate has (the candidate of two wins in every head), and no pair is a tie
# for the nearest baseline: a score read down the source's key column, or a nearest baseline that
# settles a tie, gives the same report there. Here both candidates of the first pair are one token
# each, and the tokens (the tokenizer's, checked below through the first sub-tokens) are:
#   0 [CLS] 1 the 2 member 3 p 4 ##ai 5 ##d 6 the 7 invoice 8 and 9 she 10 left 11 [SEP]:
#     she 9; member 2 (7 away), invoice 7 (2 away)
#   0 [CLS] 1 the 2 mecha 3 ##nic 4 and 5 she 6 and 7 the 8 courier 9 [SEP]:
#     she 5; mechanic 2, courier 8 (3 away each)
#   0 [CLS] 1 the 2 courier 3 and 4 the 5 mecha 6 ##nic 7 s 8 ##ai 9 ##d 10 she 11 was ...:
#     she 10; mechanic 5 (5 away), courier 2 (8 away)
# so the nearest baseline gets only the last pair right: 1 of 4. The two middle pairs are one tie
# with either candidate as the target: a tie is wrong, so no way of settling it gets both right.
SHARP_PAIRS = [
    {
        "text": "the member paid the invoice and she left",
        "source": "she",
        "target": "member",
        "distractors": ["invoice"],
    },
    {
        "text": "the mechanic and she and the courier",
        "source": "she",
        "target": "mechanic",
        "distractors": ["courier"],
    },
    {
        "text": "the mechanic and she and the courier",
        "source": "she",
        "target": "courier",
        "distractors": ["mechanic"],
    },
    {
        "text": "the courier and the mechanic said she was late",
        "source": "she",
        "target": "mechanic",
        "distractors": ["courier"],
    },
]


def test_links_read_the_sources_query_row_and_a_nearest_tie_is_wrong(bert, tmp_path):
    """The links report on pairs where reading the source's key column instead of its query row
    changes some head's verdict, and where the nearest baseline meets a tie both ways round.
    References: transformers' own attention through tests/reference.py's link accuracy (the
    source's query row), and the nearest baseline worked out by hand above."""
    from tests import reference

    hf = reference.open_hf(bert.folder)
    firsts, row_right, column_right = [], [], []
    for pair in SHARP_PAIRS:
        text = pair["text"]
        probs, spans = reference.attentions(hf, text), reference.offsets(hf, text)
        source = reference.tokens_of(spans, *reference.whole_word(text, pair["source"]))[0]
        toks = [
            reference.tokens_of(spans, *reference.whole_word(text, w))
            for w in (pair["target"], *pair["distractors"])
        ]
        firsts.append((source, [t[0] for t in toks]))
        row = [probs[:, :, source, t].sum(axis=-1) for t in toks]  # (L, H) each: the definition
        column = [probs[:, :, t, source].sum(axis=-1) for t in toks]  # the key column: wrong
        assert np.abs(row[0] - row[1]).min() > 1e-5  # no verdict rests on float32 rounding
        row_right.append(row[0] > row[1])
        column_right.append(column[0] > column[1])
    assert firsts == [(9, [2, 7]), (5, [2, 8]), (5, [8, 2]), (10, [5, 2])]  # the hand-worked positions
    accuracy, nearest = reference.link_accuracy(hf, SHARP_PAIRS)
    np.testing.assert_array_equal(accuracy, np.mean(row_right, axis=0))
    assert (np.mean(column_right, axis=0) != accuracy).any()  # the pairs tell the two readings apart
    assert nearest == 0.25

    report = link_report(bert, read_link_pairs(write_jsonl(tmp_path / "p.jsonl", SHARP_PAIRS)), batch_size=3)
    assert report.pairs == 4
    np.testing.assert_array_equal(report.accuracy, accuracy)
    assert report.nearest_baseline == 0.25


def test_head_summary_streams_and_equals_one_at_a_time(bert):
    """Batched streaming over the set equals adding one text at a time (padding respected)."""
    from viewer.core.headstats import HeadStats

    items = [TextItem(t, None, i) for i, t in enumerate(tiny.TEXTS * 3)]
    summary = run_report(HeadsKind(batch_size=4), bert, iter(items)).stats.summary()
    stats = HeadStats(bert.n_layers, bert.n_heads)
    for item in items:
        rec = bert.record(item.text)
        stats.add(rec.own_probs, rec.special, rec.causal)
    np.testing.assert_allclose(summary.entropy, stats.summary().entropy, atol=1e-6)
    assert summary.texts == 9


def test_planted_token_ranks_first(tmp_path):
    """A tiny classifier trained here to key on one planted word: the search must find it."""
    # Own generators and no dropout: nothing another thread of the test process draws from
    # the global generators (a model being opened initialises weights) changes the training.
    rng = random.Random(0)
    torch.manual_seed(0)
    folder = tiny.save(tmp_path / "planted", "bert")
    loaded = open_model(folder)

    def sample(with_token: bool) -> str:
        words = rng.choices(WORDS, k=rng.randint(4, 9))
        if with_token:
            words.insert(rng.randrange(len(words) + 1), "tuesday")
        return " ".join(words)

    texts = [(sample(i % 2 == 0), 1 if i % 2 == 0 else 0) for i in range(256)]
    model = loaded.model
    model.eval()  # gradients flow in eval mode too; eval turns dropout off
    opt = torch.optim.AdamW(model.parameters(), lr=3e-3)
    for step in range(40):  # the loss is below 0.2 by then: "tuesday" decides
        batch = texts[(step * 32) % 256 : (step * 32) % 256 + 32]
        enc = loaded.tokenizer([t for t, _ in batch], padding=True, return_tensors="pt")
        loss = model(**enc, labels=torch.tensor([y for _, y in batch])).loss
        opt.zero_grad()
        loss.backward()
        opt.step()
    items = [TextItem(sample(i % 2 == 0), None, i) for i in range(40)]
    # Both searches, screened (the default) and exhaustive, put the planted word first.
    for exhaustive in (False, True):
        report = shortcut_search(loaded, items, batch_size=16, exhaustive=exhaustive)
        top = report.words.ranking()[0]
        assert top["token"] == "tuesday", (exhaustive, report.words.ranking()[:3])
        assert top["flip_rate"] > 0.8 and top["mean_drop"] > 0.3
        assert report.texts == 40
        # Phrases containing the planted word are listed separately and rank high too.
        assert "tuesday" in report.phrases.ranking()[0]["token"]
    assert report.mode == "exhaustive"


@pytest.mark.parametrize("kind", ["gpt2", "deberta-v2"])
def test_screened_search_on_a_decoder_and_on_deberta(kind, tmp_path):
    """A causal LM (no classes: no association, the top next token predicted) and DeBERTa's
    disentangled attention: the screened search runs, and every key it confirms has the
    exhaustive search's count and flip rate (the same knockouts on the same texts)."""
    loaded = open_model(tiny.save(tmp_path / kind, kind))
    items = [TextItem(t, None, n) for n, t in enumerate(tiny.CORPUS * 2)]
    screened = shortcut_search(loaded, items, batch_size=8)
    every = shortcut_search(loaded, items, batch_size=8, exhaustive=True)
    assert screened.mode == "screened" and screened.confirmed > 0 and screened.texts == len(items)
    assert (
        screened.forwards < every.forwards == len(items) + every.words.knockouts() + every.phrases.knockouts()
    )
    for got, want in ((screened.words, every.words), (screened.phrases, every.phrases)):
        for key in got.keys():
            a, b = got.entry(key), want.entry(key)
            assert (a["count"], a["flip_rate"]) == (b["count"], b["flip_rate"]), key


def test_shortcut_counts_are_per_text_and_drop_is_real(bert):
    """count = texts a word occurs in; drop = p(pred) before minus after deleting its tokens."""
    text = "the chain and the wheel"
    items = [TextItem(text, None, 1), TextItem("the invoice", None, 2), TextItem("the member", None, 3)]
    report = shortcut_search(bert, items, phrases=False, exhaustive=True)
    entry = report.words.entry("the")
    assert entry["count"] == 3
    # By hand for "chain" in the first text (reference: docs/definitions.md "Word knockout").
    rec = bert.record(text)
    pred = rec.predicted()
    keep = [t for t, tok in zip(rec.token_ids, rec.tokens, strict=True) if tok != "chain"]
    after = bert.predict(bert.text.from_ids([keep]))[0, pred]
    assert report.words.entry("chain")["mean_drop"] == pytest.approx(
        rec.class_probabilities()[pred] - after, abs=1e-6
    )
    # Per-head focus against the model's own output_attentions (transformers): the last
    # layer's attention from [CLS] (position 0) on the sub-tokens of "chain", per head.
    import torch

    enc = bert.tokenizer(text, return_tensors="pt")
    with bert.unhooked("eager") as model, torch.no_grad():
        last = model(**enc, output_attentions=True).attentions[-1][0]  # (H, T, T)
    chain = [k for k, tok in enumerate(rec.tokens) if tok == "chain"]
    want = last[:, 0, chain].sum(dim=1).double().numpy()
    np.testing.assert_allclose(report.words.head_focus("chain"), want, atol=1e-6)
    assert report.words.entry("chain")["focus"] == pytest.approx(want.mean(), abs=1e-6)
    by_class = report.words.entry("chain")["by_class"]
    assert by_class[bert.labels[pred]]["count"] == 1 and sum(c["count"] for c in by_class.values()) == 1


def test_cli_json_holds_the_numbers_of_the_models_own_forward(bert, tmp_path, capsys):
    """`heads`, `links` and `shortcuts --json` against second implementations written in
    tests/reference.py from transformers' own output_attentions and logits (docs/definitions.md,
    "Head metrics", "Link pairs", "Word knockout"; Wilson 1927 written out)."""
    from tests import reference

    hf = reference.open_hf(bert.folder)
    texts = write_jsonl(tmp_path / "t.jsonl", [{"text": t, "label": "repair"} for t in tiny.TEXTS])
    pairs = write_jsonl(tmp_path / "p.jsonl", PAIRS)
    folder = str(bert.folder)
    argv = ["heads", folder, "--texts", str(texts), "--json", str(tmp_path / "h.json"), "--knockout-heads"]
    assert main(argv) == 0
    h = json.loads((tmp_path / "h.json").read_text())
    assert (h["layers"], h["heads"], h["texts"]) == (2, 4, 3)
    probs = [reference.attentions(hf, t) for t in tiny.TEXTS]
    np.testing.assert_allclose(h["entropy"], reference.mean_entropy(probs), atol=1e-6)
    np.testing.assert_allclose(h["distance"], reference.mean_distance(probs), atol=1e-5)
    predicted = reference.class_probabilities(hf, tiny.TEXTS).argmax(axis=1)
    assert h["base_accuracy"] == pytest.approx(np.mean(predicted == bert.labels.index("repair")))
    specials = [reference.special_tokens(hf, t) for t in tiny.TEXTS]
    np.testing.assert_allclose(h["special"], reference.mean_special_share(probs, specials), atol=1e-6)
    np.testing.assert_allclose(h["confidence"], reference.mean_confidence(probs), atol=1e-6)
    drop, accuracy = reference.head_knockout(hf, tiny.TEXTS, bert.labels.index("repair"))
    np.testing.assert_allclose(h["knockout_prob_drop"], drop, atol=1e-6)
    np.testing.assert_array_equal(h["knockout_accuracy"], accuracy)
    # importance against a finite difference of the head gate: tests/model/test_gates.py
    assert np.asarray(h["importance"]).shape == (2, 4)

    assert main(["links", folder, "--pairs", str(pairs), "--json", str(tmp_path / "l.json")]) == 0
    lk = json.loads((tmp_path / "l.json").read_text())
    accuracy, nearest = reference.link_accuracy(hf, PAIRS)
    assert lk["pairs"] == 3 and lk["nearest_baseline"] == pytest.approx(nearest)
    np.testing.assert_array_equal(lk["accuracy"], accuracy)
    flat = int(np.argmax(accuracy))
    assert lk["best"] == {"layer": flat // 4, "head": flat % 4, "accuracy": accuracy.max()}

    # each text twice: only "the" (in two of the three texts) is seen in >= 3 of the 6
    more = write_jsonl(tmp_path / "m.jsonl", [{"text": t} for t in tiny.TEXTS * 2])
    assert main(["shortcuts", folder, "--texts", str(more), "--json", str(tmp_path / "s.json")]) == 0
    sc = json.loads((tmp_path / "s.json").read_text())
    assert sc["texts"] == 6 and sc["classes"] == list(bert.labels)
    (the,) = sc["tokens"]
    outcomes = [reference.knockout(hf, t, "the") for t in tiny.TEXTS[:2]] * 2
    flips = sum(f for _, f, _ in outcomes)
    assert (the["token"], the["count"], the["flip_rate"]) == ("the", 4, flips / 4)
    assert the["mean_drop"] == pytest.approx(np.mean([d for d, _, _ in outcomes]), abs=1e-6)
    assert the["focus"] == pytest.approx(np.mean([f for _, _, f in outcomes]), abs=1e-6)
    assert the["flip_low"] == pytest.approx(reference.wilson(flips, 4)[0], abs=1e-12)
    assert len(the["head_focus"]) == bert.n_heads and sum(c["count"] for c in the["by_class"].values()) == 4
    err = capsys.readouterr().err
    # tqdm bars on stderr, counting shards
    assert "head summaries: 100%" in err and "word knockout: 100%" in err and "1/1" in err


@pytest.mark.parametrize(
    "case", ["empty", "not-utf8", "missing-word", "half-labelled", "bad-label", "encoder-shortcuts"]
)
def test_bad_input_is_one_line_exit_2(case, bert, tmp_path, capsys, minilm_dir):
    folder = str(bert.folder)
    if case == "empty":
        f = tmp_path / "e.txt"
        f.write_text("\n\n", encoding="utf-8")
        argv, expect = ["heads", folder, "--texts", str(f)], "holds no texts"
    elif case == "not-utf8":
        f = tmp_path / "latin.txt"
        f.write_bytes("caf\xe9 au lait\n".encode("latin-1"))
        argv, expect = ["shortcuts", folder, "--texts", str(f)], "not UTF-8"
    elif case == "missing-word":
        rows = PAIRS + [
            {"text": "the frame is bent", "source": "it", "target": "frame", "distractors": ["wheel"]}
        ]
        f = write_jsonl(tmp_path / "p.jsonl", rows)
        argv, expect = ["links", folder, "--pairs", str(f)], "line 4"
    elif case == "half-labelled":
        f = write_jsonl(tmp_path / "h.jsonl", [{"text": "a", "label": "repair"}, {"text": "b"}])
        argv, expect = ["heads", folder, "--texts", str(f)], "line 2 has no label"
    elif case == "bad-label":
        f = write_jsonl(tmp_path / "b.jsonl", [{"text": "a", "label": "refund"}])
        argv, expect = ["heads", folder, "--texts", str(f)], "'refund' is not one of"
    else:
        f = write_jsonl(tmp_path / "t.jsonl", [{"text": "a chain"}])
        argv, expect = ["shortcuts", str(minilm_dir), "--texts", str(f)], "needs a prediction"
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert err.startswith("headlight: error: ") and expect in err, err


def test_load_text_set_can_require_labels(tmp_path):
    f = tmp_path / "u.txt"
    f.write_text("one\ntwo\n", encoding="utf-8")
    with pytest.raises(HeadlightError, match="needs a label on every text; line 1"):
        load_text_set(f, need_labels=True)


def test_a_10_mb_text_set_streams(tmp_path):
    """Reading a 10 MB file holds one line at a time (tracemalloc peak stays small)."""
    f = tmp_path / "big.txt"
    line = "the member asked about the invoice for the new brake pads again and again\n"
    with f.open("w", encoding="utf-8") as fh:
        for _ in range(10 * 1024 * 1024 // len(line) + 1):
            fh.write(line)
    assert f.stat().st_size >= 10 * 1024 * 1024
    tracemalloc.start()
    n = sum(1 for _ in read_text_set(f))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert n > 100_000
    assert peak < 2 * 1024 * 1024, peak
