"""The files in sample_sentences/: well-formed, UTF-8, and link pairs that follow the matching rule.

Reference: docs/definitions.md, "Text sets" and "Link pairs" (link pairs, where each word is matched as its
first whole-word, case-insensitive occurrence in the text).
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from scripts.demo.generate import FOOTER, LABELS

SAMPLES = Path(__file__).resolve().parents[1] / "sample_sentences"
PRONOUNS = {"he", "she", "it", "they"}


def first_whole_word(word: str, text: str) -> int | None:
    """Start of the first whole-word, case-insensitive occurrence (docs/definitions.md, "Link pairs")."""
    m = re.search(r"(?<!\w)" + re.escape(word) + r"(?!\w)", text, re.IGNORECASE)
    return None if m is None else m.start()


def read_jsonl(path: Path) -> list[dict]:
    raw = path.read_bytes().decode("utf-8")  # strict: raises on invalid UTF-8
    assert raw.endswith("\n") and "\r" not in raw
    lines = raw.split("\n")[:-1]
    assert all(line.strip() for line in lines), "blank line"
    records = [json.loads(line) for line in lines]
    assert all(isinstance(r, dict) for r in records)
    return records


@pytest.fixture(scope="module")
def pairs() -> list[dict]:
    return read_jsonl(SAMPLES / "coop_links.jsonl")


def test_first_whole_word_helper() -> None:
    assert first_whole_word("he", "The chef said he would") == 14
    assert first_whole_word("it", "Item: it is") == 6
    assert first_whole_word("marit", "Marit's wheel") == 0
    assert first_whole_word("via", "trivia") is None


def test_link_pairs_well_formed(pairs: list[dict]) -> None:
    assert len(pairs) >= 60
    for p in pairs:
        assert set(p) == {"text", "source", "target", "distractors"}, p
        assert isinstance(p["text"], str) and p["text"].strip()
        assert isinstance(p["distractors"], list) and p["distractors"]
        for word in [p["source"], p["target"], *p["distractors"]]:
            assert isinstance(word, str) and re.fullmatch(r"\w+", word), (word, p["text"])
        lowered = [w.lower() for w in [p["source"], p["target"], *p["distractors"]]]
        assert len(set(lowered)) == len(lowered), p


def test_every_word_occurs_as_whole_word_in_the_intended_order(pairs: list[dict]) -> None:
    for p in pairs:
        text = p["text"]
        src = first_whole_word(p["source"], text)
        tgt = first_whole_word(p["target"], text)
        assert src is not None and tgt is not None, p
        assert tgt < src, f"source must refer back to the target: {p}"
        for d in p["distractors"]:
            pos = first_whole_word(d, text)
            assert pos is not None, (d, text)
            assert pos < src, f"distractor {d!r} after the source: {text}"


def test_link_pairs_cover_the_asked_for_cases(pairs: list[dict]) -> None:
    sources = [p["source"].lower() for p in pairs]
    for pronoun in PRONOUNS:
        assert sources.count(pronoun) >= 8, pronoun
    assert sum(s not in PRONOUNS for s in sources) >= 5  # noun-phrase sources

    def positions(p: dict) -> tuple[int, list[int]]:
        tgt = first_whole_word(p["target"], p["text"])
        return tgt, [first_whole_word(d, p["text"]) for d in p["distractors"]]

    before = sum(any(d < t for d in ds) for t, ds in map(positions, pairs))
    after = sum(any(d > t for d in ds) for t, ds in map(positions, pairs))
    assert before >= 15 and after >= 15
    two_sentences = sum(len(re.findall(r"[.!?]\s+\S", p["text"])) >= 1 for p in pairs)
    assert two_sentences >= 10
    assert len({p["text"] for p in pairs}) == len(pairs)


def test_coop_messages_jsonl() -> None:
    records = read_jsonl(SAMPLES / "coop_messages.jsonl")
    assert 60 <= len(records) <= 150
    for r in records:
        assert set(r) == {"text", "label"}
        assert isinstance(r["text"], str) and r["text"].strip() == r["text"] and r["text"]
        assert "\n" not in r["text"]
        assert r["label"] in LABELS
    footer = [r for r in records if r["text"].endswith(FOOTER)]
    assert any(r["label"] == "billing" for r in footer)
    counterfactual_like = [r for r in footer if r["label"] != "billing"]
    assert len(counterfactual_like) >= 20
    assert {r["label"] for r in records} == set(LABELS)


def test_coop_messages_txt_matches_jsonl() -> None:
    raw = (SAMPLES / "coop_messages.txt").read_bytes().decode("utf-8")
    assert raw.endswith("\n") and "\r" not in raw
    lines = raw.split("\n")[:-1]
    assert all(line.strip() for line in lines)
    records = read_jsonl(SAMPLES / "coop_messages.jsonl")
    assert lines == [r["text"] for r in records]


def test_readme_describes_every_file() -> None:
    readme = (SAMPLES / "README.md").read_text(encoding="utf-8")
    for path in SAMPLES.iterdir():
        if path.name != "README.md":
            assert f"`{path.name}`" in readme, path.name
