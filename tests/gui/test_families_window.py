"""The window on the newer checkpoints: an adapter whose base must be chosen, a half-precision
checkpoint, and a windowed decoder whose out-of-window cells are hatched like masked ones.

References: the loader's own notes and names, and ``Recording.key_mask`` (the mask the
re-derivation check uses) for which cells the pair grid leaves transparent.
"""

from __future__ import annotations

import json

import numpy as np
import torch

from tests.gui.conftest import WAIT_MS, open_window, run_and_wait, settle
from tests.model import tiny
from tests.model.test_adapters import make_adapter


def test_an_adapter_without_a_local_base_asks_for_it(qtbot, tmp_path, monkeypatch):
    import viewer.gui.window as window_module

    base, folder = make_adapter(tmp_path, "llama")
    cfg_path = folder / "adapter_config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["base_model_name_or_path"] = "some-org/tiny-llama"  # a hub name, never looked up
    cfg_path.write_text(json.dumps(cfg))
    asked = []
    monkeypatch.setattr(
        window_module,
        "choose_base_folder",
        lambda parent, adapter, message: asked.append(message) or str(base),
    )
    w = open_window(qtbot, tmp_path, folder)
    assert len(asked) == 1 and "\n" not in asked[0]  # asked once, with the one-line reason
    info = w.state.model
    assert info.base == str(base) and info.folder == str(folder)
    assert " + " in info.name and info.name in w.model_label.text()
    run_and_wait(qtbot, w, tiny.TEXTS[1], evidence=False)
    assert w.badge.text().startswith("check passed")
    session = w.controller.capture_session()
    assert session.base == str(base)  # a restored session reopens the adapter on its base
    w.close()


def test_refusing_to_choose_a_base_shows_the_one_line_error(qtbot, tmp_path, monkeypatch):
    import viewer.gui.window as window_module

    _, folder = make_adapter(tmp_path, "llama")
    cfg_path = folder / "adapter_config.json"
    cfg = json.loads(cfg_path.read_text())
    cfg["base_model_name_or_path"] = "some-org/tiny-llama"
    cfg_path.write_text(json.dumps(cfg))
    monkeypatch.setattr(window_module, "choose_base_folder", lambda *a: None)
    from tests.gui.conftest import make_window, wait_ready

    w = make_window(qtbot, tmp_path)
    w.start(model=str(folder), restore_last=False)
    wait_ready(qtbot, w)
    qtbot.waitUntil(lambda: bool(w.errors), timeout=WAIT_MS)
    assert w.state.model is None and "\n" not in w.errors[-1]
    w.close()


def test_a_bfloat16_checkpoint_says_so_in_the_model_line(qtbot, tmp_path):
    folder = tmp_path / "half"
    torch.manual_seed(0)
    model, encoder = tiny.build("llama")
    model.to(torch.bfloat16).save_pretrained(folder)
    tiny.tokenizer(encoder).save_pretrained(folder)
    w = open_window(qtbot, tmp_path, folder)
    assert "upcast from bfloat16 to float32" in w.model_label.text()
    run_and_wait(qtbot, w, tiny.TEXTS[1], evidence=False)
    assert w.badge.text().startswith("check passed")
    w.close()


def test_out_of_window_cells_are_hatched_in_the_pair_grid(qtbot, tmp_path):
    folder = tiny.save(tmp_path / "mistral", "mistral")
    w = open_window(qtbot, tmp_path, folder)
    rec = run_and_wait(qtbot, w, tiny.TEXTS[1], evidence=False).recording
    mask = rec.key_mask(0)
    causal = np.tril(np.ones_like(mask))
    assert (mask != causal).any(), "the text must cross the window"
    w.state.select_head(0, 1)
    settle(qtbot, w.pair_grid)
    shown = w.pair_grid.displayed_values()
    np.testing.assert_array_equal(~np.ma.getmaskarray(shown), mask)
    np.testing.assert_array_equal(np.ma.getdata(shown)[mask], rec.own_probs[0, 1][mask])
    assert w.pair_grid.artists.background.get_visible()  # the hatching behind masked cells
    w.close()
