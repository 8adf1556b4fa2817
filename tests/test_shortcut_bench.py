"""The planted-signal benchmark (bench/shortcut_bench.py) and its tile generator (server/demo/planted.py).

Protocol: Adebayo et al., "Post hoc explanations may be ineffective for detecting unknown spurious
correlation", ICLR 2022 — a model trained with a signal tied to one class, a clean twin trained
without the tie, and the question whether an audit tells them apart. The fast kinds run here with
the cached weights in bench/models/planted/; all five run with ``-m slow`` and in BENCHMARKS.md.

Whether a model leans on its signal is checked here independently of Pellucid's audit: the
model's own forward pass on tiles with the signal drawn by the test itself (an orange square in the
bottom-right corner, the demo tag's colour and size from server/demo/tiles.py).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from safetensors.torch import load_file

from bench.shortcut_bench import MODELS, model_dir, run
from pellucid.demo.net import build_tilenet, normalise
from pellucid.demo.planted import KINDS, SHORTCUT_CLASS, make_planted_split, plant
from pellucid.demo.tiles import CLASSES, make_tile

FAST_KINDS = ["corner_tag", "glaze_tint"]  # a spot in one place, and evidence spread over the background


def _net(kind: str, variant: str) -> torch.nn.Module:
    net = build_tilenet(num_classes=len(CLASSES))
    net.load_state_dict(load_file(str(model_dir(MODELS, kind, variant) / "weights.safetensors")), strict=True)
    return net.eval()


class TestPlantedTiles:
    def test_same_seed_same_bytes_and_the_stated_rates(self) -> None:
        for kind in KINDS:
            a = make_planted_split(kind, split="audit", per_class=20, seed=3)
            b = make_planted_split(kind, split="audit", per_class=20, seed=3)
            assert [r.image.tobytes() for r in a] == [r.image.tobytes() for r in b]
            cracks = [r for r in a if r.label == SHORTCUT_CLASS]
            others = [r for r in a if r.label != SHORTCUT_CLASS]
            assert sum(r.planted for r in cracks) == 18  # 90% of 20
            assert sum(r.planted for r in others) == 3  # 5% of 20, for each of the three other classes

    @pytest.mark.parametrize("kind", list(KINDS))
    def test_the_signal_changes_only_its_box(self, kind: str) -> None:
        plain = make_tile(label="sound", tagged=False, seed=11)
        marked, box = plant(plain, kind=kind, label="sound", seed=11)
        assert box is not None
        changed = np.any(marked != plain, axis=2)
        assert changed.any()
        x0, y0, x1, y1 = box
        outside = changed.copy()
        outside[y0:y1, x0:x1] = False
        assert not outside.any()

    def test_unknown_kind_is_one_sentence(self) -> None:
        from pellucid.core.errors import BadParameterError

        with pytest.raises(BadParameterError, match="unknown planted signal 'ruler'"):
            make_planted_split("ruler", split="audit", per_class=1)


def test_the_corner_tag_model_leans_on_an_orange_square_and_its_twin_does_not() -> None:
    # The signal drawn by this test, not by the generator: a 12×12 orange square 6 px from the corner.
    tiles = [make_tile(label=c, tagged=False, seed=500 + n) for c in ("sound", "chip", "bubble") for n in range(12)]
    marked = []
    for t in tiles:
        m = t.copy()
        m[78:90, 78:90] = (255, 128, 16)
        marked.append(m)
    crack = CLASSES.index(SHORTCUT_CLASS)
    with torch.inference_mode():
        calls = {v: ((_net("corner_tag", v)(normalise(torch.from_numpy(np.stack(marked)))).argmax(1) == crack)
                     .float().mean().item(),
                     (_net("corner_tag", v)(normalise(torch.from_numpy(np.stack(tiles)))).argmax(1) == crack)
                     .float().mean().item()) for v in ("shortcut", "clean")}
    assert calls["shortcut"][0] >= 0.8 and calls["shortcut"][1] <= 0.2
    assert calls["clean"][0] <= 0.3


def _check(rows: list[dict], score: dict, kinds: list[str]) -> None:
    assert score["detected"] == kinds, rows
    assert score["false_alarms"] == [], rows
    for r in rows:
        if r["variant"] == "shortcut":
            assert all(c.startswith(SHORTCUT_CLASS + "/") for c in r["confirmed"]), r


def test_default_audit_tells_the_fast_kinds_apart(tmp_path) -> None:
    rows, score = run(FAST_KINDS, per_class=16, work=tmp_path, progress=lambda _line: None)
    _check(rows, score, FAST_KINDS)


@pytest.mark.slow
def test_default_audit_tells_every_kind_apart(tmp_path) -> None:
    kinds = list(KINDS)
    rows, score = run(kinds, per_class=30, work=tmp_path, progress=lambda _line: None)
    _check(rows, score, kinds)
