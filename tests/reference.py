"""Second implementations for tests, sharing no code with ``viewer``: transformers' own forward
(the class the checkpoint names in its config, eager attention, ``output_attentions=True``) and
the definitions of docs/definitions.md written out with numpy and ``re``.

Which keys a query row sees is read off the model's own probabilities: a key it may not see
gets exactly 0 after the eager softmax (its score is the dtype's minimum), while a key it may
see would need a score more than ~100 below the row's largest to round to 0 in float32, which
the small test models here never have. ``visible_counts`` states that assumption where it is
used.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import torch
import transformers


@dataclass
class Model:
    model: torch.nn.Module
    tokenizer: object

    def encode(self, texts: list[str]):
        return self.tokenizer(texts, padding=True, return_tensors="pt", return_offsets_mapping=True)


def open_hf(folder: str | Path) -> Model:
    """The checkpoint through transformers alone: its config's architecture class, eager attention."""
    config = transformers.AutoConfig.from_pretrained(folder, local_files_only=True)
    cls = getattr(transformers, config.architectures[0])
    model = cls.from_pretrained(folder, local_files_only=True, attn_implementation="eager")
    model.eval()
    return Model(model, transformers.AutoTokenizer.from_pretrained(folder, local_files_only=True))


def attentions(m: Model, text: str) -> np.ndarray:
    """The model's own attention probabilities for one text: (L, H, T, T) float64."""
    enc = m.tokenizer(text, return_tensors="pt")
    with torch.no_grad():
        out = m.model(**enc, output_attentions=True)
    return np.stack([a[0].double().numpy() for a in out.attentions])


def offsets(m: Model, text: str) -> list[tuple[int, int]]:
    return [tuple(o) for o in m.tokenizer(text, return_offsets_mapping=True)["offset_mapping"]]


def class_probabilities(m: Model, texts: list[str]) -> np.ndarray:
    """softmax of the classifier's logits, one text at a time (no padding): (N, C) float64."""
    rows = []
    for text in texts:
        with torch.no_grad():
            logits = m.model(**m.tokenizer(text, return_tensors="pt")).logits[0]
        rows.append(torch.softmax(logits.double(), -1).numpy())
    return np.stack(rows)


def probabilities_of_ids(m: Model, ids: list[int]) -> np.ndarray:
    """A classifier's class probabilities, or a causal LM's next-token probabilities after the
    last token, for one input: (C,) float64."""
    with torch.no_grad():
        logits = m.model(input_ids=torch.tensor([ids])).logits[0]
    if logits.ndim == 2:  # (T, V): a language model predicts from its last position
        logits = logits[-1]
    return torch.softmax(logits.double(), -1).numpy()


def token_knockout(m: Model, text: str) -> np.ndarray:
    """Each ordinary token deleted alone: p(predicted) before minus after, NaN at the special
    tokens, which are never deleted: (T,) float64."""
    enc = m.tokenizer(text, return_special_tokens_mask=True)
    ids, special = enc["input_ids"], enc["special_tokens_mask"]
    before = probabilities_of_ids(m, ids)
    pred = int(before.argmax())
    row = np.full(len(ids), np.nan)
    for k in range(len(ids)):
        if not special[k]:
            row[k] = before[pred] - probabilities_of_ids(m, ids[:k] + ids[k + 1 :])[pred]
    return row


def visible_counts(probs: np.ndarray) -> np.ndarray:
    """(L, H, T) keys each row sees: those with a probability above 0 (see the module's note)."""
    return (probs > 0).sum(axis=-1)


def mean_entropy(per_text: list[np.ndarray]) -> np.ndarray:
    """docs/definitions.md, "Head metrics": each row's entropy −Σ p ln p divided by the log of
    the keys it sees, rows that see one key left out, averaged over the rows of every text
    together: (L, H)."""
    total = count = 0.0
    for probs in per_text:
        n = visible_counts(probs)  # (L, H, T)
        with np.errstate(divide="ignore", invalid="ignore"):
            h = -np.where(probs > 0, probs * np.log(probs), 0.0).sum(axis=-1)  # (L, H, T)
            ratio = np.where(n > 1, h / np.log(np.maximum(n, 2)), 0.0)
        total = total + ratio.sum(axis=-1)
        count = count + (n > 1).sum(axis=-1)
    return total / count


def mean_distance(per_text: list[np.ndarray]) -> np.ndarray:
    """Σ_j p_ij |i − j| averaged over the rows of every text together: (L, H)."""
    total = rows = 0.0
    for probs in per_text:
        t = probs.shape[-1]
        i = np.arange(t)
        total = total + (probs * np.abs(i[:, None] - i[None, :])).sum(axis=(-1, -2))
        rows += t
    return total / rows


def special_tokens(m: Model, text: str) -> np.ndarray:
    """(T,) bool: the tokenizer's own special-tokens mask of the text."""
    return np.asarray(m.tokenizer(text, return_special_tokens_mask=True)["special_tokens_mask"], dtype=bool)


def mean_special_share(per_text: list[np.ndarray], specials: list[np.ndarray]) -> np.ndarray:
    """docs/definitions.md, "Head metrics": Σ_{j special} p_ij averaged over the rows of every
    text together: (L, H)."""
    total = rows = 0.0
    for probs, special in zip(per_text, specials, strict=True):
        total = total + probs[..., special].sum(axis=(-1, -2))
        rows += probs.shape[-1]
    return total / rows


def mean_confidence(per_text: list[np.ndarray]) -> np.ndarray:
    """Voita et al. 2019, §4.1: a head's confidence is the mean over rows of the row's largest
    weight, here over the rows of every text together: (L, H)."""
    total = rows = 0.0
    for probs in per_text:
        total = total + probs.max(axis=-1).sum(axis=-1)
        rows += probs.shape[-1]
    return total / rows


@contextmanager
def heads_masked(model: torch.nn.Module, heads) -> Iterator[None]:
    """Inside the block, the (layer, head) pairs of ``heads`` are knocked out of a BERT-style
    encoder: each head's slice of the attention context is zeroed on the way into the layer's
    output projection, ``layer.N.attention.output.dense`` (head masking, Michel et al. 2019:
    ξ_h = 0 on the head's output)."""
    config = model.config
    d = config.hidden_size // config.num_attention_heads
    dense = {
        int(found.group(1)): module
        for name, module in model.named_modules()
        if (found := re.search(r"layer\.(\d+)\.attention\.output\.dense$", name))
    }
    assert sorted(dense) == list(range(config.num_hidden_layers))

    def zero(cols):
        def hook(_module, args):
            context = args[0].clone()
            for h in cols:
                context[..., h * d : (h + 1) * d] = 0
            return (context, *args[1:])

        return hook

    handles = [
        dense[layer].register_forward_pre_hook(zero([h for lay, h in heads if lay == layer]))
        for layer in sorted({layer for layer, _ in heads})
    ]
    try:
        yield
    finally:
        for handle in handles:
            handle.remove()


def head_knockout(m: Model, texts: list[str], label: int) -> tuple[np.ndarray, np.ndarray]:
    """Each head knocked out alone (``heads_masked``): the mean drop of p(originally predicted
    class) and the accuracy against ``label``: (L, H) each."""
    n_l, n_h = m.model.config.num_hidden_layers, m.model.config.num_attention_heads
    before = class_probabilities(m, texts)
    pred = before.argmax(axis=1)
    drop, accuracy = np.zeros((n_l, n_h)), np.zeros((n_l, n_h))
    for layer in range(n_l):
        for head in range(n_h):
            with heads_masked(m.model, [(layer, head)]):
                after = class_probabilities(m, texts)
            drop[layer, head] = np.mean(
                before[np.arange(len(pred)), pred] - after[np.arange(len(pred)), pred]
            )
            accuracy[layer, head] = np.mean(after.argmax(axis=1) == label)
    return drop, accuracy


def whole_word(text: str, word: str) -> tuple[int, int]:
    """docs/definitions.md, "Link pairs": the first whole-word, case-insensitive occurrence."""
    found = re.search(r"(?<![0-9A-Za-z_])" + re.escape(word) + r"(?![0-9A-Za-z_])", text, re.IGNORECASE)
    assert found is not None, (word, text)
    return found.span()


def tokens_of(spans: list[tuple[int, int]], start: int, end: int) -> list[int]:
    """Tokens whose character span overlaps [start, end) (empty spans belong to no word)."""
    return [k for k, (s, e) in enumerate(spans) if e > s and s < end and e > start]


def link_accuracy(m: Model, pairs: list[dict]) -> tuple[np.ndarray, float]:
    """docs/definitions.md, "Link pairs": per head, the share of pairs whose target's score
    (attention from the source's first sub-token summed over the candidate's sub-tokens) is
    strictly above every distractor's; and the share the nearest baseline gets right."""
    right, nearest = 0.0, 0
    for pair in pairs:
        text = pair["text"]
        probs, spans = attentions(m, text), offsets(m, text)
        source = tokens_of(spans, *whole_word(text, pair["source"]))[0]
        words = [pair["target"], *pair["distractors"]]
        toks = [tokens_of(spans, *whole_word(text, w)) for w in words]
        scores = [probs[:, :, source, t].sum(axis=-1) for t in toks]  # each (L, H)
        right = right + np.all([scores[0] > s for s in scores[1:]], axis=0)
        dist = [abs(t[0] - source) for t in toks]
        nearest += all(dist[0] < d for d in dist[1:])
    return right / len(pairs), nearest / len(pairs)


def strip_word(raw: str) -> str:
    """A whitespace word's key (docs/definitions.md, "Word knockout"): lower-cased, the
    punctuation at its ends stripped; written with ``str.strip`` of ASCII punctuation, which is
    all the test texts hold."""
    return raw.strip("!\"#$%&'()*+,-./:;<=>?@[\\]^_`{|}~").lower()


def knockout(m: Model, text: str, word: str) -> tuple[float, bool, float]:
    """Knock ``word`` out of ``text`` (docs/definitions.md, "Word knockout"): delete the
    sub-tokens of every whitespace word whose key is ``word`` (special tokens kept) and run the
    model again. Returns (drop of p(predicted), flipped, focus: the last layer's head-mean
    attention from the first token on the deleted sub-tokens)."""
    enc = m.tokenizer(text, return_offsets_mapping=True, return_special_tokens_mask=True)
    spans, special = enc["offset_mapping"], enc["special_tokens_mask"]
    gone: set[int] = set()
    pos = 0
    for raw in text.split():
        start = text.index(raw, pos)
        pos = start + len(raw)
        if strip_word(raw) == word:
            gone |= {k for k in tokens_of(spans, start, pos) if not special[k]}
    assert gone, (word, text)
    ids = enc["input_ids"]
    before = probabilities_of_ids(m, ids)
    after = probabilities_of_ids(m, [t for k, t in enumerate(ids) if k not in gone])
    pred = int(before.argmax())
    focus = attentions(m, text)[-1].mean(axis=0)[0, sorted(gone)].sum()
    return float(before[pred] - after[pred]), int(after.argmax()) != pred, float(focus)


def wilson(k: int, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson (1927)'s score interval, written out: (p + z²/2n ± z·sqrt(p(1−p)/n + z²/4n²)) / (1 + z²/n)."""
    p = k / n
    centre, half = p + z * z / (2 * n), z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n))
    return (centre - half) / (1 + z * z / n), (centre + half) / (1 + z * z / n)


def card_matches_the_models_own_numbers(
    data: dict, model: Path, labelled: list[tuple[str, str]], pairs: list[dict]
) -> None:
    """card.json against second implementations from transformers' own forward
    (docs/definitions.md's head metrics, link pairs, word knockout and accuracy written out
    above) for a card of the ``labelled`` (text, label) set and link ``pairs`` in which "the"
    is the one word seen in at least 3 texts, in 4 of them."""
    hf = open_hf(model)
    texts = [t for t, _ in labelled]
    probs = [attentions(hf, t) for t in texts]
    np.testing.assert_allclose(data["heads"]["entropy"], mean_entropy(probs), atol=1e-6)
    np.testing.assert_allclose(data["heads"]["distance"], mean_distance(probs), atol=1e-5)
    accuracy, nearest = link_accuracy(hf, pairs)
    np.testing.assert_array_equal(data["links"]["accuracy"], accuracy)
    assert data["links"]["nearest_baseline"] == pytest.approx(nearest)
    labels = hf.model.config.id2label
    predicted = [labels[int(k)] for k in class_probabilities(hf, texts).argmax(axis=1)]
    right = sum(p == y for p, (_, y) in zip(predicted, labelled, strict=True))
    assert (data["accuracy"]["correct"], data["accuracy"]["labelled"]) == (right, len(texts))
    assert data["accuracy"]["accuracy"] == pytest.approx(right / len(texts))
    (the,) = data["shortcuts"]["tokens"]
    outcomes = [knockout(hf, t, "the") for t in texts if "the" in t.split()]
    flips = sum(f for _, f, _ in outcomes)
    assert (the["token"], the["count"], the["flip_rate"]) == ("the", 4, flips / 4)
    assert the["mean_drop"] == pytest.approx(np.mean([d for d, _, _ in outcomes]), abs=1e-6)
    assert the["focus"] == pytest.approx(np.mean([f for _, _, f in outcomes]), abs=1e-6)
    assert the["flip_low"] == pytest.approx(wilson(flips, 4)[0], abs=1e-12)
    assert data["check"]["passed"] is True and data["check"]["texts"] == len(texts)
    ev = data["evaluation_data"]
    assert (ev["texts"], ev["labelled"], ev["pairs"]) == (len(texts), len(texts), len(pairs))
