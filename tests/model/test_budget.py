"""The memory budget: the estimate against measured memory, and the one-line refusal.

References: the peak resident memory a real recording adds above the loaded model, sampled from
/proc every 2 ms in a process of its own (Linux); the budget's definition in
``viewer/core/budget.py`` for which length is the longest that fits.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tests.model import tiny
from viewer.cli import main
from viewer.core.budget import longest_that_fits
from viewer.model.budget import parse_size, pass_estimate
from viewer.model.loader import open_model

ROOT = Path(__file__).resolve().parents[2]

MEASURE = r"""
import ctypes, gc, json, os, sys, threading, time
sys.path.insert(0, sys.argv[1])
from viewer.model import runs
from viewer.model.budget import pass_estimate
from viewer.model.loader import open_model

def rss():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")

loaded = open_model(sys.argv[2])
loaded.record("the chain")  # warm the kernels
out = []
for words in map(int, sys.argv[3:]):
    text = " ".join(["the mechanic trued the wheel and she replaced the chain"] * words)
    batch = loaded.encode([text])
    estimate = pass_estimate(loaded, batch.lengths, keep=True, own_probs=runs.wants_own_probs(loaded, batch))
    gc.collect(); ctypes.CDLL("libc.so.6").malloc_trim(0)
    base = top = rss(); done = threading.Event()
    def sample():
        global top
        while not done.is_set():
            top = max(top, rss()); time.sleep(0.002)
    thread = threading.Thread(target=sample); thread.start()
    rec = loaded.record(text)
    done.set(); thread.join()
    out.append({"tokens": batch.lengths[0], "estimate": estimate.total, "used": max(top, rss()) - base})
    del rec
print(json.dumps(out))
"""


@pytest.fixture(scope="module")
def mid_bert(tmp_path_factory):
    """A random BERT of 6 layers × 8 heads, hidden 512, 4,096 positions: big enough that a
    recording's arrays, not the allocator's noise, make its memory."""
    return tiny.save(
        tmp_path_factory.mktemp("mid"),
        "bert",
        hidden_size=512,
        num_attention_heads=8,
        num_hidden_layers=6,
        intermediate_size=2048,
        max_position_embeddings=4096,
    )


@pytest.mark.slow
@pytest.mark.skipif(not Path("/proc/self/statm").exists(), reason="reads resident memory from /proc")
def test_the_estimate_is_close_to_the_measured_peak_and_seldom_under_it(mid_bert):
    """At three lengths (10 words make about 12 tokens here), in a fresh process.

    The band is lopsided on purpose: an estimate under the peak is the dangerous side (a text
    that was let in can run the machine out of memory), so it may be at most 20% under; an
    estimate over the peak only refuses a text that would have fitted, and the allocator's reuse
    of freed blocks moves the measured peak by a fifth from run to run, so it may be 45% over.
    """
    out = subprocess.run(
        [sys.executable, "-c", MEASURE, str(ROOT), str(mid_bert), "120", "240", "330"],
        capture_output=True,
        text=True,
        env={**os.environ, "HF_HUB_OFFLINE": "1"},
        check=True,
    )
    rows = json.loads(out.stdout.strip().splitlines()[-1])
    assert [r["tokens"] > 1000 for r in rows] == [True, True, True]
    for row in rows:
        assert 0.8 <= row["estimate"] / row["used"] <= 1.45, row


def test_a_text_over_the_budget_is_refused_in_one_line_naming_what_fits(mid_bert, capsys, monkeypatch):
    loaded = open_model(mid_bert)
    text = " ".join(["the mechanic trued the wheel and she replaced the chain"] * 100)  # ~1,200 tokens
    n = loaded.encode([text]).lengths[0]
    assert n > 1000 and not loaded.encode([text]).truncated_from[0]

    def need(tokens: int) -> int:
        return pass_estimate(loaded, [tokens], keep=False, own_probs=False).total

    limit = (need(n // 2) + need(n)) // 2  # room for half the text, not for all of it
    monkeypatch.setenv("HEADLIGHT_MEMORY", str(limit))
    assert main(["check", str(mid_bert), "--text", text]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "needs about" in err and "is free" in err
    most = longest_that_fits(lambda k: need(k) <= limit, n)
    assert n // 2 <= most < n
    assert f"at most {most:,} tokens fit (cut with --max-tokens {most})" in err
    # the length it names fits, and the check then passes and says the text was cut
    assert main(["check", str(mid_bert), "--text", text, "--max-tokens", str(most)]) == 0
    out = capsys.readouterr().out
    assert f"note: text cut from {n} to {most} tokens (--max-tokens: {most:,})" in out, out


def test_memory_sizes_are_read_as_written():
    assert parse_size("4G") == 4 * 2**30 and parse_size("512M") == 512 * 2**20
    assert parse_size("2.5GB") == int(2.5 * 2**30) and parse_size("1000") == 1000
    for bad in ("lots", "-1G", "0"):
        with pytest.raises(Exception, match="HEADLIGHT_MEMORY"):
            parse_size(bad)
