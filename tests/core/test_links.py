"""Link scores and the link-pairs parser (viewer.core.links)."""

import re

import numpy as np
import pytest

from viewer.core.links import (
    LinkAccuracy,
    PairTokens,
    find_word,
    heads_correct,
    iter_link_pairs,
    link_scores,
    make_pair,
    nearest_correct,
    pair_tokens,
    read_link_pairs,
    score_pair,
    word_token_indices,
)
from viewer.errors import HeadlightError

TEXT = "The mechanic told the courier that she would fix the bicycle."


def _toy_tokenise(text: str):
    """A stand-in tokenizer: [CLS], words split into pieces of at most 4 letters, [SEP]."""
    offsets = [(0, 0)]
    for m in re.finditer(r"\w+|[^\w\s]", text):
        for s in range(m.start(), m.end(), 4):
            offsets.append((s, min(s + 4, m.end())))
    offsets.append((0, 0))
    return np.array(offsets)


def _brute_force_scores(probs, offsets, text, source, candidates):
    """Outside reference, written independently of the module: locate words with str.lower()
    scanning and explicit word-boundary checks, map to tokens by explicit loops, sum by loops."""
    low = text.lower()

    def locate(word):
        w = word.lower()
        start = 0
        while True:
            k = low.find(w, start)
            assert k >= 0
            before = low[k - 1] if k > 0 else " "
            after = low[k + len(w)] if k + len(w) < len(low) else " "
            if not (before.isalnum() or before == "_") and not (after.isalnum() or after == "_"):
                return k, k + len(w)
            start = k + 1

    def tokens_of(span):
        out = []
        for t, (s, e) in enumerate(offsets.tolist()):
            if e > s and s < span[1] and e > span[0]:
                out.append(t)
        return out

    src = tokens_of(locate(source))[0]
    n_layers, n_heads = probs.shape[:2]
    scores = np.zeros((len(candidates), n_layers, n_heads))
    for k, cand in enumerate(candidates):
        for j in tokens_of(locate(cand)):
            for layer in range(n_layers):
                for head in range(n_heads):
                    scores[k, layer, head] += probs[layer, head, src, j]
    return scores


def test_scores_against_brute_force():
    offsets = _toy_tokenise(TEXT)
    t = len(offsets)
    rng = np.random.default_rng(0)
    probs = rng.random((3, 4, t, t))
    probs /= probs.sum(axis=-1, keepdims=True)
    pair = make_pair(TEXT, "she", "Mechanic", ["courier", "bicycle"])
    result = score_pair(lambda i: probs[:, :, i], offsets, pair)
    ref = _brute_force_scores(probs, offsets, TEXT, "she", ["mechanic", "courier", "bicycle"])
    assert result.scores.shape == (3, 3, 4)
    np.testing.assert_allclose(result.scores, ref, rtol=1e-12)
    expected = (ref[0] > ref[1]) & (ref[0] > ref[2])
    np.testing.assert_array_equal(result.correct, expected)
    assert expected.any() and not expected.all()  # the check is not vacuous


def test_multi_token_words_sum_all_candidate_tokens_and_use_first_source_token():
    # hand-made: "mechanic" -> "mech", "anic"; "courier" -> "cour", "ier"; source "would"
    # -> "woul", "d"; only the source's first piece is the query row
    offsets = _toy_tokenise(TEXT)
    pair = make_pair(TEXT, "would", "mechanic", ["courier"])
    toks = pair_tokens(pair, offsets)
    pieces = [TEXT[s:e] for s, e in offsets[toks.candidates[0]]]
    assert pieces == ["mech", "anic"]
    assert [TEXT[s:e] for s, e in offsets[toks.source]] == ["woul", "d"]
    t = len(offsets)
    probs = np.zeros((1, 2, t, t))
    s0, s1 = toks.source
    m0, m1 = toks.candidates[0]
    c0, c1 = toks.candidates[1]
    probs[0, 0, s0, [m0, m1, c0]] = [0.2, 0.2, 0.3]  # target 0.4 beats distractor 0.3
    probs[0, 1, s0, [m0, c0, c1]] = [0.3, 0.2, 0.2]  # distractor 0.4 beats target 0.3
    probs[0, :, s1, c0] = 1.0  # the second source piece's row is never read
    scores = link_scores(probs[:, :, s0], toks)
    np.testing.assert_allclose(scores[:, 0, :], [[0.4, 0.3], [0.3, 0.4]])
    np.testing.assert_array_equal(heads_correct(scores), [[True, False]])


def test_tie_is_wrong_for_a_head():
    scores = np.array([[[0.3]], [[0.3]]])
    assert not heads_correct(scores)[0, 0]


def test_word_matching_rules():
    # docs/definitions.md ("Link pairs"): first whole-word, case-insensitive occurrence
    text = "Shelly said She fixed it; she did."
    assert find_word(text, "she") == (12, 15)  # not inside "Shelly"; first whole word, any case
    assert find_word("the co-op's bikes", "co-op") == (4, 9)
    assert find_word("[via portal]", "[via") == (0, 4)
    assert find_word("mechanics", "mechanic") is None


def test_token_mapping_ignores_specials_and_uses_overlap():
    offsets = np.array([[0, 0], [0, 3], [3, 8], [8, 9], [9, 13], [0, 0]])
    np.testing.assert_array_equal(word_token_indices((0, 8), offsets), [1, 2])
    np.testing.assert_array_equal(word_token_indices((4, 10), offsets), [2, 3, 4])
    # GPT-2 style offsets that include the leading space still overlap
    np.testing.assert_array_equal(word_token_indices((9, 13), np.array([[0, 4], [4, 13]])), [1])


def _tokens(source: int, *candidates: int) -> PairTokens:
    return PairTokens(np.array([source]), tuple(np.array([c, c + 1]) for c in candidates))


def test_nearest_baseline_hand_made():
    assert nearest_correct(_tokens(5, 3, 9))  # target 2 away, distractor 4 away
    assert not nearest_correct(_tokens(5, 1, 7))  # distractor closer (after the source)
    assert not nearest_correct(_tokens(5, 3, 7))  # equally close: a tie counts as wrong
    assert not nearest_correct(_tokens(5, 7, 3))  # the same tie with the target after the source
    assert not nearest_correct(_tokens(5, 8, 0, 2))  # a tie with the second distractor (3 away each)
    assert nearest_correct(_tokens(5, 6, 2, 9))  # target right after the source
    # first sub-tokens decide: target starts at 1 (distance 4) even though it spans 1..2
    assert not nearest_correct(PairTokens(np.array([5]), (np.array([1, 2]), np.array([8]))))


def test_accuracy_tally_and_best():
    tally, other = LinkAccuracy(2, 2), LinkAccuracy(2, 2)

    class R:  # minimal PairResult stand-in
        def __init__(self, correct, nearest):
            self.correct, self.nearest = np.array(correct), nearest

    tally.add(R([[True, False], [True, True]], True))
    tally.add(R([[False, False], [True, False]], False))
    other.add(R([[True, False], [True, False]], False))
    tally.merge(other)
    np.testing.assert_allclose(tally.accuracy, [[2 / 3, 0], [1, 1 / 3]])
    assert tally.nearest_baseline == pytest.approx(1 / 3)
    assert tally.best() == (1, 0, 1.0)
    d = tally.to_dict()
    assert d["pairs"] == 3 and d["best"] == {"layer": 1, "head": 0, "accuracy": 1.0}
    assert LinkAccuracy(1, 1).to_dict()["nearest_baseline"] is None


def _write(tmp_path, content, name="pairs.jsonl"):
    p = tmp_path / name
    p.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
    return p


GOOD = (
    '{"text": "The mechanic called the courier because she was late.", "source": "she", '
    '"target": "mechanic", "distractors": ["courier"]}'
)


def test_parser_reads_good_file(tmp_path):
    p = _write(tmp_path, "\ufeff" + GOOD + "\n\n" + GOOD + "\n")
    pairs = read_link_pairs(p)
    assert [q.line for q in pairs] == [1, 3]
    assert pairs[0].target_span == (4, 12) and pairs[0].distractors == ("courier",)


@pytest.mark.parametrize(
    "bad,needle",
    [
        ('{"text": "a b", "source": "a"', "not valid JSON"),
        ('{"text": "she, he", "source": "she", "distractors": ["he"]}', "missing field 'target'"),
        ('{"text": "she, he", "source": "she", "target": "he", "distractors": []}', "distractors"),
        ('["a"]', "JSON object"),
        (
            '{"text": "she fixed it", "source": "she", "target": "mechanic", "distractors": ["x"]}',
            "target word 'mechanic' does not occur",
        ),
        (
            '{"text": "she fixed it", "source": "she", "target": "it", "distractors": ["IT"]}',
            "same word",
        ),
    ],
)
def test_parser_errors_name_the_line(tmp_path, bad, needle):
    p = _write(tmp_path, GOOD + "\n" + GOOD + "\n" + bad + "\n")
    with pytest.raises(HeadlightError) as info:
        read_link_pairs(p)
    message = str(info.value)
    assert "line 3" in message and needle in message
    assert "\n" not in message


def test_parser_rejects_non_utf8(tmp_path):
    p = _write(tmp_path, GOOD.encode() + b"\n" + '{"text": "caf\u00e9"}'.encode("latin-1") + b"\n")
    with pytest.raises(HeadlightError, match=r"line 2 is not UTF-8"):
        read_link_pairs(p)


def test_parser_streams_lazily(tmp_path):
    # an error on a later line is raised only when the stream gets there
    p = _write(tmp_path, GOOD + "\nnot json\n")
    stream = iter_link_pairs(p)
    assert next(stream).line == 1
    with pytest.raises(HeadlightError, match="line 2"):
        next(stream)


def test_parser_empty_and_missing_files(tmp_path):
    with pytest.raises(HeadlightError, match="no link pairs"):
        read_link_pairs(_write(tmp_path, "\n\n"))
    with pytest.raises(HeadlightError, match="cannot read"):
        read_link_pairs(tmp_path / "absent.jsonl")


def test_word_cut_off_by_truncation_is_reported():
    pair = make_pair(TEXT, "she", "bicycle", ["courier"], line=7)
    offsets = _toy_tokenise(TEXT)[:10]  # text cut before "bicycle"
    with pytest.raises(HeadlightError, match="line 7: word 'bicycle' has no tokens"):
        pair_tokens(pair, offsets)


def test_text_words_are_located_as_a_pair_word_would_be():
    from viewer.core.links import text_words

    text = "The co-op's bikes, (again)! -- _tag_ co-op"
    spans = text_words(text)
    assert [text[a:b] for a, b in spans] == ["The", "co-op's", "bikes", "again", "tag", "co-op"]
    # each word's span is what find_word gives from where its whitespace word starts
    assert spans[1] == find_word(text, "co-op's")
    assert spans[5] == find_word(text, "co-op", spans[4][1])
