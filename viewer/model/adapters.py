"""PEFT adapters (LoRA and the other kinds ``peft`` loads), merged into their base at open time.

``viewer.model.folders.adapter_folder`` has already checked the adapter folder and found the
base model folder; the base is opened like any model folder, then ``peft`` loads the adapter
(``adapter_model.safetensors``; a pickle ``adapter_model.bin`` only with the pickle opt-in) and
``merge_and_unload`` folds it into the base weights. The merged model is an ordinary model of
the base's family: the hooks, the check and the head gates see nothing special. The merge is
peft's own, never a hand-written one.
"""

from __future__ import annotations

import warnings
from typing import Any

from viewer.errors import HeadlightError
from viewer.model.folders import AdapterFolder


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:240] if text else type(exc).__name__


def describe(adapter: AdapterFolder) -> str:
    """ "LoRA r=8" style description from adapter_config.json."""
    kind = str(adapter.config.get("peft_type", "adapter"))
    kind = {"LORA": "LoRA"}.get(kind.upper(), kind)
    rank = adapter.config.get("r")
    return f"{kind} r={rank}" if rank else kind


def merge_adapter(model: Any, adapter: AdapterFolder) -> Any:
    """The base ``model`` with the adapter's weights merged in (peft: PeftModel +
    merge_and_unload). An adapter that does not fit the base is a one-line refusal."""
    from peft import PeftModel

    refusal = f"adapter {adapter.path.name} does not fit base model {adapter.base.name}"
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            peft_model = PeftModel.from_pretrained(model, str(adapter.path), is_trainable=False)
        except (ValueError, RuntimeError, KeyError, TypeError, OSError) as exc:
            raise HeadlightError(f"{refusal}: {_first_line(exc)}") from None
    missing = [str(w.message) for w in caught if "missing adapter keys" in str(w.message)]
    if missing:
        raise HeadlightError(f"{refusal}: {missing[0][:240]}")
    try:
        merged = peft_model.merge_and_unload()
    except (ValueError, RuntimeError, NotImplementedError) as exc:
        raise HeadlightError(f"adapter {adapter.path.name} cannot be merged: {_first_line(exc)}") from None
    merged.eval()
    return merged
