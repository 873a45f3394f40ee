"""The screen's gradient × input, against PyTorch autograd on the model's own forward."""

from __future__ import annotations

import numpy as np
import torch

from viewer.demo import MODEL_DIR
from viewer.model.loader import open_model
from viewer.model.runs import attentions

TEXTS = [
    "My rear brake cable snapped, can someone fix it this week? [via portal]",
    "Please email the invoice.",
]


def test_gradient_times_input_is_autograds_on_the_unhooked_model():
    """Reference: the model's own forward on ``inputs_embeds`` (no hooks of ours), one text at
    a time, F = log p_c − log(1 − p_c) of the predicted class c from torch.log_softmax, and
    Σ_dims x ⊙ ∂F/∂x by torch.autograd (gradient × input: Shrikumar et al. 2017). The pass
    batches both texts (padding the shorter) and must give each its own gradient."""
    loaded = open_model(MODEL_DIR)
    got = list(attentions(loaded, TEXTS, 8, gradients=True))
    for text, att in zip(TEXTS, got, strict=True):
        enc = loaded.tokenizer(text, return_tensors="pt")
        with loaded.unhooked("eager") as model:
            x = model.get_input_embeddings()(enc["input_ids"]).detach().requires_grad_(True)
            logits = model(inputs_embeds=x, attention_mask=enc["attention_mask"]).logits[0].double()
            logp = torch.log_softmax(logits, -1)
            c = int(logp.argmax())
            rest = torch.logsumexp(torch.cat([logp[:c], logp[c + 1 :]]), 0)
            (g,) = torch.autograd.grad(logp[c] - rest, x)
        want = (x * g)[0].sum(-1).detach().double().numpy()
        assert att.grad_input is not None and att.grad_input.shape == want.shape
        np.testing.assert_allclose(att.grad_input, want, atol=1e-4 * np.abs(want).max())
        assert int(np.argmax(att.target)) == c
    # the captures were detached: the pass's attention rows are plain numbers
    assert np.isfinite(got[0].attention_from(0)).all()
