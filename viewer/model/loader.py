"""Opening a checked checkpoint folder, offline, and recording texts through it.

``open_model(folder)`` first has ``viewer.model.folders`` check the folder without deserialising
anything (config, remote code, weight files, safetensors headers, pickle opt-in, tokenizer,
adapter folders). The model is then loaded with the eager attention implementation so that
probabilities exist, from local files only: nothing is ever looked up on a model hub.
"""

from __future__ import annotations

import dataclasses
import os
import pickle
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

# Never reach for a model hub, not even for a name that looks like a hub id.
os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("HF_HUB_DISABLE_TELEMETRY", "1")

import torch  # noqa: E402
import transformers  # noqa: E402
from transformers import (  # noqa: E402
    AutoConfig,
    AutoModel,
    AutoModelForCausalLM,
    AutoModelForMaskedLM,
    AutoModelForSequenceClassification,
    AutoTokenizer,
)

from viewer.core.recording import Recording  # noqa: E402
from viewer.core.rotary import apply_rotary  # noqa: E402
from viewer.core.terms import ScoreTerms, layer_masks  # noqa: E402
from viewer.errors import HeadlightError  # noqa: E402
from viewer.model.adapters import describe, merge_adapter  # noqa: E402
from viewer.model.families import (  # noqa: E402
    Family,
    Geometry,
    Window,
    _deberta_terms,
    _get,
    check_supported,
    family_for,
    layer_scale,
)
from viewer.model.folders import (  # noqa: E402
    AdapterFolder,
    ModelFolder,
    adapter_folder,
    existing_folder,
    is_adapter_folder,
    model_folder,
)
from viewer.model.recorder import AttentionHooks, Capture  # noqa: E402

transformers.logging.set_verbosity_error()
transformers.logging.disable_progress_bar()

HEAD_KINDS = {
    "ForSequenceClassification": ("classifier", AutoModelForSequenceClassification),
    "ForMaskedLM": ("masked-lm", AutoModelForMaskedLM),
    "ForPreTraining": ("masked-lm", AutoModelForMaskedLM),
    "ForCausalLM": ("causal-lm", AutoModelForCausalLM),
    "LMHeadModel": ("causal-lm", AutoModelForCausalLM),
}


def _head_kind(config: dict) -> tuple[str, Any, str | None]:
    archs = config.get("architectures") or []
    arch = archs[0] if archs else ""
    for suffix, (kind, auto) in HEAD_KINDS.items():
        if arch.endswith(suffix):
            return kind, auto, None
    note = None
    if arch and not arch.endswith("Model"):
        note = f"head {arch} is not one Headlight reads; showing the bare encoder"
    return "encoder", AutoModel, note


def _max_tokens(config: Any, tokenizer: Any, family: Family) -> int:
    positions = _get(config, "max_position_embeddings", "n_positions", default=512)
    # RoBERTa-style position ids start after the padding index (padding_idx + 1)
    positions -= family.position_offset
    limit = getattr(tokenizer, "model_max_length", None)
    if isinstance(limit, int) and 0 < limit < positions:
        positions = limit
    return int(positions)


@dataclass(frozen=True)
class Batch:
    encoding: Any  # transformers BatchEncoding (input_ids, attention_mask, offsets, specials)
    lengths: list[int]  # real tokens per text
    truncated_from: list[int | None]
    texts: list[str]


@dataclass(frozen=True, eq=False)
class Attention:
    """What dataset-level reports need of one text (T its own tokens, no padding)."""

    text: str
    token_ids: np.ndarray  # (T,)
    offsets: np.ndarray  # (T, 2)
    special: np.ndarray  # (T,) bool
    probs: np.ndarray  # (L, H, T, T) the model's own attention probabilities
    target: np.ndarray | None  # (C,) target probabilities, None without a prediction head
    truncated_from: int | None
    causal: bool = False
    window: np.ndarray | None = None  # (L, 2) keys (before, after) each layer sees; -1 = all

    def key_masks(self) -> np.ndarray | None:
        """(L, T, T) bool keys each query row sees, or None when every row sees every key.

        The same definition as ``Recording.key_masks`` (``viewer.core.terms``); pass it to
        ``HeadStats.add(..., visible=...)`` so entropy is normalised by the visible keys.
        """
        return layer_masks(len(self.token_ids), self.causal, self.window, self.probs.shape[0])


class LoadedModel:
    """A checkpoint opened for recording: the torch model, its tokenizer and attention hooks."""

    def __init__(
        self,
        folder: Path,
        model: Any,
        tokenizer: Any,
        family: Family,
        geometry: Geometry,
        head_kind: str,
        notes: tuple[str, ...],
    ):
        self.folder = folder
        # the model line: "folder", "base + adapter" for a merged adapter
        self.name = _folder_name(folder)
        self.base_folder: Path | None = None  # the base model folder of a merged adapter
        self.model = model
        self.tokenizer = tokenizer
        self.family = family
        self.geometry = geometry
        self.head_kind = head_kind
        self.notes = notes
        self.weight_files: tuple[Path, ...] = ()
        self.config = model.config
        self.n_layers = _layer_count(self.config)
        self.max_tokens = _max_tokens(self.config, tokenizer, family)
        self.scales = np.array([layer_scale(family, self.config, i, geometry) for i in range(self.n_layers)])
        self.windows = _window_array(family.windows(self.config, self.n_layers), self.n_layers)
        cap = float(family.softcap(self.config))
        self.softcaps = np.full(self.n_layers, cap) if cap > 0 else None
        # DeBERTa: which of the position terms the model adds (shared projections compute both)
        self.position_terms = frozenset(_position_terms(family, self.config))
        id2label = getattr(self.config, "id2label", None) or {}
        if head_kind == "classifier":
            n = int(getattr(self.config, "num_labels", len(id2label)))
            self.labels = tuple(str(id2label.get(i, id2label.get(str(i), i))) for i in range(n))
        else:
            self.labels = ()
        self.hooks = AttentionHooks(model, family, geometry, self.n_layers)
        self._check_module_scales()
        # Causal classifiers find their summary token via the pad id; with none defined they
        # can only run one text at a time.
        self.max_batch = 64
        if tokenizer.pad_token is None:
            fallback = tokenizer.eos_token or tokenizer.unk_token
            if fallback is None:
                self.max_batch = 1
            else:
                tokenizer.pad_token = fallback
            if head_kind == "classifier" and getattr(self.config, "pad_token_id", None) is None:
                self.max_batch = 1
        if (
            family.causal
            and head_kind == "classifier"
            and tokenizer.pad_token_id != getattr(self.config, "pad_token_id", None)
        ):
            # the classifier reads the last token that is not its pad id: pad with nothing else
            self.max_batch = 1

    @property
    def n_heads(self) -> int:
        return self.geometry.n_heads

    @contextmanager
    def unhooked(self) -> Iterator[Any]:
        """The plain torch model with none of Headlight's hooks (for references and timing)."""
        self.hooks.remove()
        try:
            yield self.model
        finally:
            self.hooks = AttentionHooks(self.model, self.family, self.geometry, self.n_layers)

    def _check_module_scales(self) -> None:
        """Refuse when an attention module's own scale differs from the family rule."""
        for layer, name in enumerate(self.hooks.module_names):
            parent = self.model.get_submodule(name.rsplit(".", 1)[0]) if "." in name else None
            own = getattr(parent, "scaling", None)
            if isinstance(own, (int, float)):
                rule = self.scales[layer]
                if abs(float(own) - rule) > 1e-9 * max(1.0, abs(rule)):
                    raise HeadlightError(
                        f"{self.family.name} layer {layer} scales scores by {own}, not the "
                        f"family's {rule}; refusing rather than re-deriving wrong numbers"
                    )

    # -- tokenising ---------------------------------------------------------------------
    def encode(self, texts: Sequence[str]) -> Batch:
        texts = [str(t) for t in texts]
        full = self.tokenizer(texts, add_special_tokens=True)["input_ids"]
        enc = self.tokenizer(
            texts,
            padding=True,
            truncation=True,
            max_length=self.max_tokens,
            return_offsets_mapping=True,
            return_special_tokens_mask=True,
            return_tensors="pt",
        )
        lengths = [int(n) for n in enc["attention_mask"].sum(dim=1)]
        cut = [len(f) if len(f) > n else None for f, n in zip(full, lengths, strict=True)]
        return Batch(enc, lengths, cut, texts)

    def batch_from_ids(self, id_lists: Sequence[Sequence[int]]) -> Batch:
        """A right-padded batch from token-id lists (e.g. texts with tokens knocked out)."""
        width = max(len(ids) for ids in id_lists)
        pad = self.tokenizer.pad_token_id
        ids = torch.full((len(id_lists), width), pad if pad is not None else 0, dtype=torch.long)
        mask = torch.zeros((len(id_lists), width), dtype=torch.long)
        for i, row in enumerate(id_lists):
            ids[i, : len(row)] = torch.as_tensor(list(row), dtype=torch.long)
            mask[i, : len(row)] = 1
        lengths = [len(r) for r in id_lists]
        return Batch(
            {"input_ids": ids, "attention_mask": mask}, lengths, [None] * len(lengths), [""] * len(lengths)
        )

    def target_probabilities(self, batch: Batch, out: Any) -> torch.Tensor:
        """(B, C) the distribution a prediction is read from.

        A classifier's class probabilities; for a causal LM, the next-token distribution at each
        text's last real token (the only position that sees the whole text).
        """
        logits = out.logits
        if self.head_kind == "classifier":
            return torch.softmax(logits.float(), dim=-1)
        if self.head_kind == "causal-lm":
            last = torch.as_tensor(batch.lengths) - 1
            return torch.softmax(logits[torch.arange(len(last)), last].float(), dim=-1)
        raise HeadlightError(
            f"{self.name} has a {self.head_kind} head with no prediction to explain; this needs "
            "a sequence classifier or a causal language model"
        )

    def predict(self, batch: Batch, gates: torch.Tensor | None = None) -> np.ndarray:
        """(B, C) target probabilities (float64) without gradients."""
        out, _ = self.forward(batch, gates=gates)
        return self.target_probabilities(batch, out).double().numpy()

    def predict_ids(self, id_lists: Sequence[Sequence[int]], batch_size: int = 32) -> np.ndarray:
        """(N, C) target probabilities for many token-id lists, in padded batches."""
        parts = [
            self.predict(self.batch_from_ids(id_lists[i : i + batch_size]))
            for i in range(0, len(id_lists), max(1, min(batch_size, self.max_batch)))
        ]
        return np.concatenate(parts, axis=0)

    def output_projection(self, layer: int) -> np.ndarray:
        """(H*d, D) weight of a layer's attention output projection in x @ W convention."""
        module = self.hooks.out_modules[self._module_index(layer)]
        weight = module.weight.detach().double().numpy()
        # nn.Linear stores (out, in); GPT-2's Conv1D stores (in, out).
        return weight if type(module).__name__ == "Conv1D" else weight.T

    def _module_index(self, layer: int) -> int:
        """Which of the distinct attention modules runs as `layer` (ALBERT shares them).

        ALBERT runs num_hidden_layers passes; pass p uses layer group
        p // (num_hidden_layers / num_hidden_groups), each group holding inner_group_num layers.
        """
        if len(self.hooks.out_modules) == self.n_layers:
            return layer
        inner = int(getattr(self.config, "inner_group_num", 1))
        passes = int(self.config.num_hidden_layers)
        groups = int(getattr(self.config, "num_hidden_groups", 1))
        pass_index, inner_index = divmod(layer, inner)
        return int(pass_index / (passes / groups)) * inner + inner_index

    def attentions(self, texts: Sequence[str], batch_size: int = 16) -> Iterator[Attention]:
        """Light recording: only probabilities, offsets, specials and logits per text.

        Used by dataset-level reports, which need neither Q/K/V nor head outputs.
        """
        size = max(1, min(batch_size, self.max_batch))
        for start in range(0, len(texts), size):
            batch = self.encode(texts[start : start + size])
            out, _ = self.forward(batch, output_attentions=True)
            probs = torch.stack(out.attentions, dim=1).float().numpy()  # (B, L, H, T, T)
            predicts = (
                self.head_kind in ("classifier", "causal-lm") and getattr(out, "logits", None) is not None
            )
            targets = self.target_probabilities(batch, out).double().numpy() if predicts else None
            enc = batch.encoding
            for i, n in enumerate(batch.lengths):
                yield Attention(
                    text=batch.texts[i],
                    token_ids=enc["input_ids"][i, :n].numpy().copy(),
                    offsets=enc["offset_mapping"][i, :n].numpy().copy(),
                    special=enc["special_tokens_mask"][i, :n].numpy().astype(bool),
                    probs=probs[i, :, :, :n, :n].copy(),
                    target=None if targets is None else targets[i].copy(),
                    truncated_from=batch.truncated_from[i],
                    causal=self.family.causal,
                    window=self.windows,
                )

    def model_inputs(self, batch: Batch) -> dict:
        return {"input_ids": batch.encoding["input_ids"], "attention_mask": batch.encoding["attention_mask"]}

    # -- running ------------------------------------------------------------------------
    def forward(
        self,
        batch: Batch,
        *,
        capture: bool = False,
        gates: torch.Tensor | None = None,
        output_attentions: bool = False,
        grad: bool = False,
        **extra: Any,
    ):
        """One forward pass over a batch; returns (model output, capture or None).

        gates: (L, H) multiplicative per-head gates on the head outputs (1 = untouched,
        0 = knocked out); leave None for the plain model.
        """
        self.hooks.gates = gates
        self.hooks.begin(capture)
        inputs = self.model_inputs(batch)
        inputs.update(extra)
        try:
            with torch.set_grad_enabled(grad):
                out = self.model(**inputs, output_attentions=output_attentions)
            cap = self.hooks.end()
        finally:
            self.hooks.gates = None
            self.hooks.capturing = False
        return out, (cap if capture else None)

    def record_batch(self, batch: Batch) -> list[Recording]:
        out, cap = self.forward(batch, capture=True, output_attentions=True)
        return self._recordings(batch, out, cap)

    def record(self, text: str) -> Recording:
        """Record one text: every layer's and head's Q, K, V, probabilities and head outputs."""
        return self.record_batch(self.encode([text]))[0]

    def record_many(self, texts: Sequence[str], batch_size: int = 16) -> Iterator[Recording]:
        """Record many texts in padded batches; yields one recording per text, in order."""
        size = max(1, min(batch_size, self.max_batch))
        for start in range(0, len(texts), size):
            yield from self.record_batch(self.encode(texts[start : start + size]))

    def _recordings(self, batch: Batch, out: Any, cap: Capture) -> list[Recording]:
        attentions = out.attentions
        if attentions is None or len(attentions) != self.n_layers:
            got = 0 if attentions is None else len(attentions)
            raise RuntimeError(f"model returned {got} attention maps for {self.n_layers} layers")
        probs = torch.stack(attentions, dim=1).float().numpy()  # (B, L, H, T, T)
        q = torch.stack(cap.q, dim=1).float().numpy()  # (B, L, H, T, d)
        k = torch.stack(cap.k, dim=1).float().numpy()  # (B, L, G, T, d)
        v = torch.stack(cap.v, dim=1).float().numpy()  # (B, L, G, T, d)
        ctx = torch.stack(cap.context, dim=1).float().numpy()  # (B, L, H, T, d)
        rotary = self._rotary_tables(cap)
        terms = self._batch_terms(cap)
        logits = getattr(out, "logits", None)
        logits = None if logits is None else logits.detach().float().numpy()
        enc = batch.encoding
        ids = enc["input_ids"].numpy()
        offsets = enc["offset_mapping"].numpy()
        specials = enc["special_tokens_mask"].numpy().astype(bool)
        recs = []
        for i, n in enumerate(batch.lengths):
            qi, ki = q[i, :, :, :n], k[i, :, :, :n]
            if rotary:
                qi, ki = qi.copy(), ki.copy()
                for layers, (cos, sin) in rotary:
                    row = min(i, cos.shape[0] - 1)  # tables may be shared across the batch
                    cos_i, sin_i = cos[row, :n], sin[row, :n]
                    qi[layers] = apply_rotary(qi[layers], cos_i, sin_i)
                    ki[layers] = apply_rotary(ki[layers], cos_i, sin_i)
            if self.head_kind == "classifier":
                lg = logits[i].copy()
            elif logits is not None and logits.ndim == 3:
                lg = logits[i, :n].copy()
            else:
                lg = np.zeros(0, dtype=np.float32)
            notes = list(self.notes)
            if batch.truncated_from[i] is not None:
                notes.append(
                    f"text cut from {batch.truncated_from[i]} to {n} tokens "
                    f"(the model reads at most {self.max_tokens})"
                )
            tok_ids = ids[i, :n].copy()
            recs.append(
                Recording(
                    text=batch.texts[i],
                    tokens=tuple(self.tokenizer.convert_ids_to_tokens(tok_ids.tolist())),
                    offsets=offsets[i, :n].copy(),
                    special=specials[i, :n].copy(),
                    token_ids=tok_ids,
                    q=np.ascontiguousarray(qi, dtype=np.float32),
                    k=np.ascontiguousarray(ki, dtype=np.float32),
                    v=v[i, :, :, :n].copy(),
                    probs=probs[i, :, :, :n, :n].copy(),
                    context=ctx[i, :, :, :n].copy(),
                    scale=self.scales.copy(),
                    causal=self.family.causal,
                    logits=lg,
                    head_kind=self.head_kind,
                    labels=self.labels,
                    family=self.family.name,
                    model_name=self.name,
                    truncated_from=batch.truncated_from[i],
                    notes=tuple(notes),
                    terms=_text_terms(terms, n),
                )
            )
        return recs

    def _rotary_tables(self, cap: Capture) -> list[tuple[list[int], tuple[np.ndarray, ...]]]:
        """[(layers, (cos, sin))]: the model's own tables, layers sharing one table grouped.

        ModernBERT and Gemma 3 use other bases in their local layers, so tables are per layer.
        """
        if not cap.rotary:
            return []
        if len(cap.rotary) != self.n_layers:
            raise RuntimeError(f"captured {len(cap.rotary)} rotary tables for {self.n_layers} layers")
        groups: dict[int, tuple[list[int], tuple[np.ndarray, ...]]] = {}
        for layer, (cos, sin) in enumerate(cap.rotary):
            key = cos.data_ptr()
            if key not in groups:
                groups[key] = ([], (cos.float().numpy(), sin.float().numpy()))  # (B or 1, T, r)
            groups[key][0].append(layer)
        return list(groups.values())

    def _batch_terms(self, cap: Capture) -> ScoreTerms:
        """The score terms of the whole batch (relative indices still at the padded length)."""
        pos_key = pos_query = bias = None
        if "c2p" in self.position_terms:
            pos_key = _stack_layers(cap.pos_key, self.n_layers, "position keys")
        if "p2c" in self.position_terms:
            pos_query = _stack_layers(cap.pos_query, self.n_layers, "position queries")
        if cap.bias is not None:
            table = cap.bias.float().numpy()  # (H, R), one table for every layer
            bias = np.broadcast_to(table, (self.n_layers, *table.shape))
        index = None
        if pos_key is not None or pos_query is not None or bias is not None:
            if cap.rel_index is None:
                raise RuntimeError(f"{self.family.name}: relative positions were not captured")
            index = cap.rel_index.numpy().astype(np.int64)
        return ScoreTerms(
            rel_index=index,
            pos_key=pos_key,
            pos_query=pos_query,
            bias=bias,
            softcap=self.softcaps,
            window=self.windows,
        )


def _stack_layers(parts: list[torch.Tensor], n_layers: int, what: str) -> np.ndarray:
    if len(parts) != n_layers:
        raise RuntimeError(f"captured {what} for {len(parts)} of {n_layers} layers")
    return torch.stack(parts).float().numpy()  # (L, H, R, d)


def _text_terms(terms: ScoreTerms, n: int) -> ScoreTerms:
    """One text's terms: the relative indices cut to its n tokens, the tables shared."""
    if terms.rel_index is None:
        return terms
    return dataclasses.replace(terms, rel_index=np.ascontiguousarray(terms.rel_index[:n, :n]))


def _window_array(windows: list[Window], n_layers: int) -> np.ndarray | None:
    """(L, 2) int64 (before, after) per layer, -1 for an unbounded side; None without windows."""
    if len(windows) != n_layers:
        raise HeadlightError(f"config.json lists {len(windows)} layer types for {n_layers} layers")
    if all(w is None for w in windows):
        return None
    return np.array([(-1, -1) if w is None else w for w in windows], dtype=np.int64)


def _position_terms(family: Family, config: Any) -> list[str]:
    if family.relative != "disentangled" or not getattr(config, "relative_attention", False):
        return []
    return [t for t in _deberta_terms(config) if t in ("c2p", "p2c")]


def _layer_count(config: Any) -> int:
    n = _get(config, "num_hidden_layers", "n_layer", "n_layers")
    if getattr(config, "model_type", "") == "albert":
        n *= int(getattr(config, "inner_group_num", 1))
    return int(n)


def open_model(
    folder: str | os.PathLike, *, base: str | os.PathLike | None = None, allow_pickle: bool = False
) -> LoadedModel:
    """Open a local Hugging Face-format folder for recording (offline, eager attention).

    A PEFT adapter folder (``adapter_config.json``) opens on its base model: ``base`` when
    given, else the adapter's ``base_model_name_or_path`` when that is a local folder; without
    either, ``viewer.model.folders.NeedsBaseModel`` is raised (a ``HeadlightError``).
    """
    path = existing_folder(folder)
    if is_adapter_folder(path):
        adapter = adapter_folder(path, base, allow_pickle)
        return _open_checked(model_folder(adapter.base, allow_pickle), adapter)
    if base is not None:
        raise HeadlightError(
            f"{path} is a model folder, not an adapter; a base model folder applies to adapter folders only"
        )
    return _open_checked(model_folder(path, allow_pickle))


def _open_checked(checked: ModelFolder, adapter: AdapterFolder | None = None) -> LoadedModel:
    """Load a folder that ``viewer.model.folders`` has checked (with an adapter merged in)."""
    path, raw = checked.path, checked.config
    family = family_for(raw.get("model_type"))
    head_kind, auto_cls, note = _head_kind(raw)
    try:
        config = AutoConfig.from_pretrained(path, local_files_only=True, trust_remote_code=False)
    except (ValueError, OSError, TypeError, KeyError) as exc:
        raise HeadlightError(f"config.json in {path} cannot be read: {_first_line(exc)}") from None
    check_supported(family, config)
    geometry = family.head_geometry(config)
    tok_path = adapter.path if adapter is not None and adapter.has_tokenizer else path
    try:
        tokenizer = AutoTokenizer.from_pretrained(tok_path, local_files_only=True, trust_remote_code=False)
    except (ValueError, OSError, TypeError, KeyError, AttributeError, RuntimeError) as exc:
        raise HeadlightError(f"tokenizer in {tok_path} cannot be loaded: {_first_line(exc)}") from None
    if not getattr(tokenizer, "is_fast", False):
        raise HeadlightError(f"tokenizer in {tok_path} is not a fast tokenizer (needed for offsets)")
    tokenizer.padding_side = "right"
    try:
        model, info = auto_cls.from_pretrained(
            path,
            config=config,
            attn_implementation="eager",
            dtype=torch.float32,  # bfloat16/float16 weights are upcast: the check runs at 1e-5
            local_files_only=True,
            trust_remote_code=False,
            use_safetensors=checked.safetensors,
            weights_only=True,
            output_loading_info=True,
        )
    except pickle.UnpicklingError as exc:
        raise HeadlightError(
            f"pickle weights in {path} hold more than tensors and were refused by "
            f"weights_only=True: {_first_line(exc)[:160]}"
        ) from None
    except (RuntimeError, ValueError, OSError, KeyError, EOFError) as exc:
        raise HeadlightError(f"weights in {path} do not fit config.json: {_first_line(exc)}") from None
    mismatched = info.get("mismatched_keys") or []
    if mismatched:
        first = mismatched[0]
        raise HeadlightError(f"weights in {path} do not match config.json in shape: {first}")
    missing = [k for k in info.get("missing_keys") or [] if "position_ids" not in k]
    if missing:
        raise HeadlightError(
            f"weights in {path} lack {len(missing)} parameter(s) the config needs, e.g. {missing[0]}"
        )
    model.eval()
    notes = [n for n in (note, _upcast_note(checked)) if n]
    if adapter is not None:
        model = merge_adapter(model, adapter)
        notes.append(
            f"adapter {adapter.path.name} ({describe(adapter)}) merged into base {_folder_name(path)}"
        )
    loaded = LoadedModel(
        adapter.path if adapter else path, model, tokenizer, family, geometry, head_kind, tuple(notes)
    )
    loaded.weight_files = checked.weights
    if adapter is not None:
        loaded.name = f"{_folder_name(path)} + {_folder_name(adapter.path)}"
        loaded.base_folder = path
        loaded.weight_files += (adapter.weights,)
    return loaded


def _folder_name(folder: Path) -> str:
    """A folder called just "model" says little: name it with its parent ("demo/model")."""
    return folder.name if folder.name != "model" else f"{folder.parent.name}/model"


def _upcast_note(checked: ModelFolder) -> str | None:
    if checked.stored_dtype is None:
        return None
    return f"upcast from {checked.stored_dtype} to float32"


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:300] if text else type(exc).__name__
