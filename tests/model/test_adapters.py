"""PEFT adapters and reduced-precision checkpoints.

Adapters are built here with ``peft`` itself on tiny bases; the merged model's outputs are
compared with peft's own un-merged ``PeftModel`` (reference: peft), the prediction must move
away from the base's, and the re-derivation check must pass. A bfloat16 checkpoint is upcast at
load and passes the check at the usual 1e-5, its probabilities equal to those of a float32
eager load by transformers (reference).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch
from peft import LoraConfig, PeftModel, get_peft_model
from safetensors.torch import load_file
from transformers import AutoModelForCausalLM, AutoModelForSequenceClassification

from tests.model import tiny
from viewer.cli import main
from viewer.core.attention import check_recording
from viewer.errors import HeadlightError
from viewer.model.folders import NeedsBaseModel
from viewer.model.loader import open_model

ADAPTERS = {
    # a classifier adapter: LoRA on the attention projections, the classifier head retrained
    "bert": (
        AutoModelForSequenceClassification,
        dict(
            r=4,
            lora_alpha=8,
            target_modules=["query", "value"],
            task_type="SEQ_CLS",
            modules_to_save=["classifier"],
        ),
    ),
    # a decoder adapter: LoRA on q, v and the output projection (where the head gates sit)
    "llama": (
        AutoModelForCausalLM,
        dict(r=4, lora_alpha=8, target_modules=["q_proj", "v_proj", "o_proj"], task_type="CAUSAL_LM"),
    ),
}


def make_adapter(root: Path, kind: str, seed: int = 1) -> tuple[Path, Path]:
    """(base folder, adapter folder): a tiny base and a LoRA adapter with random (non-zero) B."""
    base = tiny.save(root / f"{kind}-base", kind)
    auto, options = ADAPTERS[kind]
    model = auto.from_pretrained(base, attn_implementation="eager")
    torch.manual_seed(seed)
    peft_model = get_peft_model(model, LoraConfig(init_lora_weights=False, **options))
    with torch.no_grad():  # stand-in for training: large LoRA updates, a retrained head
        for name, param in peft_model.named_parameters():
            if "lora_B" in name or "modules_to_save" in name:
                param.normal_(0.0, 0.5)
    folder = root / f"{kind}-adapter"
    peft_model.save_pretrained(folder)
    cfg_path = folder / "adapter_config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["base_model_name_or_path"] = str(base)
    cfg_path.write_text(json.dumps(cfg))
    return base, folder


@pytest.fixture(scope="module", params=sorted(ADAPTERS))
def adapter(request, tmp_path_factory):
    return request.param, *make_adapter(tmp_path_factory.mktemp("adapters"), request.param)


def prediction(loaded, text: str) -> np.ndarray:
    return loaded.predict(loaded.encode([text]))[0]


def test_adapter_opens_merged_and_passes_the_check(adapter):
    kind, base_dir, folder = adapter
    loaded, base = open_model(folder), open_model(base_dir)
    assert loaded.name == f"{base_dir.name} + {folder.name}"
    assert any("merged into base" in n and "LoRA r=4" in n for n in loaded.notes)
    assert loaded.base_folder == base_dir and loaded.family is base.family
    moved = np.log(prediction(loaded, tiny.TEXTS[1])) - np.log(prediction(base, tiny.TEXTS[1]))
    assert np.abs(moved).max() > 0.1, "the adapter changes the prediction (log-probabilities)"
    rec = loaded.record(tiny.TEXTS[1])
    assert rec.model_name == loaded.name
    assert check_recording(rec).passed


def test_merged_model_equals_peft_unmerged(adapter):
    """Reference: peft's PeftModel forward with the adapter kept separate (no merge)."""
    kind, base_dir, folder = adapter
    loaded = open_model(folder)
    auto, _ = ADAPTERS[kind]
    reference = PeftModel.from_pretrained(
        auto.from_pretrained(base_dir, attn_implementation="eager"), folder
    ).eval()
    enc = loaded.tokenizer(tiny.TEXTS[1], return_tensors="pt")
    with torch.no_grad():
        theirs = reference(**enc).logits
    ours = loaded.forward(loaded.encode([tiny.TEXTS[1]]))
    # a causal LM keeps only the last position's logits, the one a prediction is read from
    torch.testing.assert_close(ours.logits[:, -1], theirs[:, -1], atol=1e-5, rtol=1e-5)


def test_headlight_check_exits_0_on_an_adapter(adapter, capsys):
    assert main(["check", str(adapter[2])]) == 0
    assert "passed" in capsys.readouterr().out


def test_missing_base_asks_for_one(tmp_path, capsys):
    base, folder = make_adapter(tmp_path, "llama")
    cfg_path = folder / "adapter_config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["base_model_name_or_path"] = "some-org/tiny-llama"  # a hub name, never looked up
    cfg_path.write_text(json.dumps(cfg))
    with pytest.raises(NeedsBaseModel, match="--base") as info:
        open_model(folder)
    assert isinstance(info.value, HeadlightError) and "\n" not in str(info.value)
    assert main(["check", str(folder)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert check_recording(open_model(folder, base=base).record(tiny.TEXTS[0])).passed
    assert main(["check", str(folder), "--base", str(base)]) == 0


def test_adapter_for_another_base_is_refused(tmp_path, capsys):
    _, folder = make_adapter(tmp_path, "llama")
    other = tiny.save(tmp_path / "bert", "bert")
    with pytest.raises(HeadlightError, match="does not fit base model") as info:
        open_model(folder, base=other)
    assert "\n" not in str(info.value)
    capsys.readouterr()
    assert main(["check", str(folder), "--base", str(other)]) == 2
    assert capsys.readouterr().err.count("\n") == 1


def test_adapter_base_with_remote_code_is_refused(tmp_path):
    base, folder = make_adapter(tmp_path, "llama")
    cfg = json.loads((base / "config.json").read_text())
    cfg["auto_map"] = {"AutoModel": "modeling_evil.EvilModel"}
    (base / "config.json").write_text(json.dumps(cfg))
    with pytest.raises(HeadlightError, match="remote code"):
        open_model(folder)


def test_pickle_adapter_needs_opt_in(tmp_path):
    _, folder = make_adapter(tmp_path, "llama")
    weights = folder / "adapter_model.safetensors"
    torch.save(load_file(weights), folder / "adapter_model.bin")
    weights.unlink()
    with pytest.raises(HeadlightError, match="--allow-pickle"):
        open_model(folder)
    assert check_recording(open_model(folder, allow_pickle=True).record("the chain")).passed


def test_base_given_for_a_plain_model_folder_is_refused(tmp_path):
    folder = tiny.save(tmp_path / "b", "bert")
    with pytest.raises(HeadlightError, match="not an adapter"):
        open_model(folder, base=folder)


@pytest.mark.parametrize("dtype", [torch.bfloat16, torch.float16])
def test_half_precision_checkpoint_is_upcast_and_passes(tmp_path, dtype):
    folder = tmp_path / "half"
    torch.manual_seed(0)
    model, encoder = tiny.build("llama")
    model.to(dtype).save_pretrained(folder)
    tiny.tokenizer(encoder).save_pretrained(folder)
    loaded = open_model(folder)
    name = str(dtype).removeprefix("torch.")
    assert f"upcast from {name} to float32" in loaded.notes
    assert all(p.dtype == torch.float32 for p in loaded.model.parameters())
    rec = loaded.record(tiny.TEXTS[1])
    result = check_recording(rec, 1e-5)
    assert result.passed, result.to_dict()
    # reference: transformers' own eager load of the same folder, upcast to float32
    ref = AutoModelForCausalLM.from_pretrained(
        folder, attn_implementation="eager", dtype=torch.float32
    ).eval()
    with torch.no_grad():
        out = ref(**loaded.tokenizer(tiny.TEXTS[1], return_tensors="pt"), output_attentions=True)
    np.testing.assert_allclose(rec.own_probs, torch.stack(out.attentions, 1)[0].numpy(), atol=1e-6)
