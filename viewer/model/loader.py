"""Opening a checked checkpoint folder, offline, as a ``LoadedModel``.

``open_model(folder)`` first has ``viewer.model.folders`` check the folder without deserialising
anything (config, remote code, weight files, safetensors headers, pickle opt-in, tokenizer,
adapter folders). The model is then loaded from local files only (nothing is ever looked up on
a model hub) with the memory-efficient attention kernel ("sdpa") where transformers offers it
for the family, else the eager one; ``viewer.model.runs`` switches to eager where the model's
own probabilities are wanted.

A ``LoadedModel`` is the opened checkpoint and its parts, each with one job: ``text``
(tokenising and batching, ``viewer.model.tokens``), ``tables`` (the per-layer numbers of the
family, ``viewer.model.tables``), ``hooks`` (capture and head gates, ``viewer.model.recorder``);
its verbs (forward, predict, record) are ``viewer.model.runs``.
"""

from __future__ import annotations

import os
import pickle
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
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
from viewer.errors import HeadlightError  # noqa: E402
from viewer.model import runs  # noqa: E402
from viewer.model.adapters import describe, merge_adapter  # noqa: E402
from viewer.model.families import Family, Geometry, check_supported, family_for  # noqa: E402
from viewer.model.folders import (  # noqa: E402
    AdapterFolder,
    ModelFolder,
    adapter_folder,
    existing_folder,
    is_adapter_folder,
    model_folder,
)
from viewer.model.names import card_name_of, display_name  # noqa: E402
from viewer.model.recorder import AttentionHooks  # noqa: E402
from viewer.model.tables import LayerTables  # noqa: E402
from viewer.model.tokens import Batch, TextEncoder  # noqa: E402

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


class LoadedModel:
    """A checkpoint opened for recording: the torch model, its parts, and its verbs."""

    def __init__(
        self,
        folder: Path,
        model: Any,
        tokenizer: Any,
        family: Family,
        geometry: Geometry,
        head_kind: str,
        notes: tuple[str, ...],
        kernel: str = "eager",
    ):
        self.folder = folder
        # the model line: "folder", "base + adapter" for a merged adapter
        self.name = _folder_name(folder)
        self.display_name = self.name  # what the model's own card calls it (``viewer.model.names``)
        self.base_folder: Path | None = None  # the base model folder of a merged adapter
        self.model = model
        self.tokenizer = tokenizer
        self.family = family
        self.geometry = geometry
        self.head_kind = head_kind
        self.notes = notes
        self.kernel = kernel  # the attention kernel the model runs by default
        self.weight_files: tuple[Path, ...] = ()
        self.config = model.config
        self.tables = LayerTables(family, self.config, geometry)
        self.text = TextEncoder(tokenizer, self.config, family, head_kind)
        id2label = getattr(self.config, "id2label", None) or {}
        if head_kind == "classifier":
            n = int(getattr(self.config, "num_labels", len(id2label)))
            self.labels = tuple(str(id2label.get(i, id2label.get(str(i), i))) for i in range(n))
        else:
            self.labels = ()
        self.hooks = AttentionHooks(model, family, geometry, self.n_layers)
        self.tables.check_module_scales([(name, _parent(model, name)) for name in self.hooks.module_names])

    # -- sizes ----------------------------------------------------------------------------------
    @property
    def n_layers(self) -> int:
        return self.tables.n_layers

    @property
    def n_heads(self) -> int:
        return self.geometry.n_heads

    @property
    def max_tokens(self) -> int:
        return self.text.max_tokens

    @property
    def max_batch(self) -> int:
        return self.text.max_batch

    @contextmanager
    def unhooked(self, kernel: str | None = None) -> Iterator[Any]:
        """The plain torch model with none of Headlight's hooks (for references and timing),
        running ``kernel`` ("eager" for the model's own probabilities) when given."""
        self.hooks.remove()
        try:
            with runs.attention_kernel(self, kernel or self.kernel):
                yield self.model
        finally:
            self.hooks = AttentionHooks(self.model, self.family, self.geometry, self.n_layers)

    def output_projection(self, layer: int) -> np.ndarray:
        """(H*d, D) weight of a layer's attention output projection in x @ W convention."""
        modules = self.hooks.out_modules
        module = modules[self.tables.module_index(layer, len(modules))]
        weight = module.weight.detach().double().numpy()
        # nn.Linear stores (out, in); GPT-2's Conv1D stores (in, out).
        return weight if type(module).__name__ == "Conv1D" else weight.T

    # -- verbs (viewer.model.runs) ---------------------------------------------------------------
    def encode(self, texts: Sequence[str]) -> Batch:
        return self.text.encode(texts)

    def forward(self, batch: Batch, **options: Any):
        return runs.forward(self, batch, **options)

    def predict(self, batch: Batch, gates: torch.Tensor | None = None) -> np.ndarray:
        return runs.predict(self, batch, gates)

    def predict_ids(self, id_lists: Sequence[Sequence[int]], batch_size: int = 32) -> np.ndarray:
        return runs.predict_ids(self, id_lists, batch_size)

    def target_probabilities(self, batch: Batch, out: Any) -> torch.Tensor:
        return runs.target_probabilities(self, batch, out)

    def record(self, text: str, own_probs: bool | None = None) -> Recording:
        """Record one text: every layer's and head's Q, K, V, score terms and attention output
        (and the model's own probabilities where they fit, ``runs.OWN_PROBS_BYTES``)."""
        return runs.recordings(self, self.encode([text]), own_probs)[0]

    def record_many(self, texts: Sequence[str], batch_size: int = 16) -> Iterator[Recording]:
        """Record many texts in padded batches; yields one recording per text, in order."""
        size = max(1, min(batch_size, self.max_batch))
        for start in range(0, len(texts), size):
            yield from runs.recordings(self, self.encode(texts[start : start + size]))


def _parent(model: Any, name: str) -> Any:
    """The module holding a projection (its attention module), or None at the top level."""
    return model.get_submodule(name.rsplit(".", 1)[0]) if "." in name else None


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
    kernel = attention_kernel_for(auto_cls, config, family)
    try:
        model, info = auto_cls.from_pretrained(
            path,
            config=config,
            attn_implementation=kernel,
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
        adapter.path if adapter else path, model, tokenizer, family, geometry, head_kind, tuple(notes), kernel
    )
    loaded.weight_files = checked.weights
    loaded.display_name = display_name(path, raw)
    if adapter is not None:
        loaded.name = f"{_folder_name(path)} + {_folder_name(adapter.path)}"
        loaded.display_name = card_name_of(adapter.path) or loaded.name
        loaded.base_folder = path
        loaded.weight_files += (adapter.weights,)
    return loaded


def attention_kernel_for(auto_cls: Any, config: Any, family: Family) -> str:
    """ "sdpa" where transformers offers it for this model class and the family adds no score
    term it cannot express (relative-position terms, soft-capping); else "eager"."""
    if family.relative is not None or family.softcap(config) > 0:
        return "eager"
    try:
        model_cls = auto_cls._model_mapping[type(config)]
    except (KeyError, AttributeError):
        return "eager"
    return "sdpa" if getattr(model_cls, "_supports_sdpa", False) else "eager"


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
