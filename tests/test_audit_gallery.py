"""Channel response gallery (checked against brute force) and feature visualisation."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch

from pellucid.core.audit import channel_gallery, feature_visual, load_dataset
from pellucid.core.audit.gallery import selectivity, top_units
from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.views.probe import Probe
from pellucid.demo.tiles import make_split, write_folder
from tests.test_audit_engine import _tiny_model


@pytest.fixture(scope="module")
def tiny(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("gallery")
    model = load_model(_tiny_model(root / "model"))
    write_folder(make_split("clean", per_class=2, seed=9), root / "data")
    items = [{**i.to_dict(), "path": str(i.path)} for i in load_dataset(root / "data").items]
    return model, items


def _brute_force(model, items, layer: str, top: int):
    """Every activation of the folder, sorted (value desc, image, position) per channel."""
    acts = []
    for item in items:
        x = prepare(model.spec, read_image(Path(item["path"]))).tensor
        with Probe(model.module, [layer]) as probe, torch.inference_mode():
            model.module(x)
        acts.append(probe.outputs[layer][0].numpy().astype(np.float64))
    c, h, w = acts[0].shape
    stack = np.stack(acts).reshape(len(acts), c, h * w)  # (images, C, positions)
    image_of = np.repeat(np.arange(len(acts)), h * w)
    pos_of = np.tile(np.arange(h * w), len(acts))
    best = []
    for ch in range(c):
        values = stack[:, ch, :].reshape(-1)
        order = np.lexsort((pos_of, image_of, -values))[:top]  # value desc, then image, then position
        best.append([(-values[k], int(image_of[k]), int(pos_of[k])) for k in order])
    return best, (c, h, w)


@pytest.mark.parametrize("layer", ["features.block1.relu", "features.block2.conv"])
def test_top_patches_are_the_true_top_activations(tiny, layer: str) -> None:
    # Common practice, no source: a bounded top-N must equal sorting everything.
    model, items = tiny
    g = channel_gallery(model, items, layer=layer, top=5)
    best, (c, h, w) = _brute_force(model, items, layer, 5)
    assert g.output_shape == (c, h, w)
    for ch in range(c):
        got = [(-float(g.values[ch, n]), int(g.items[ch, n]), int(g.ys[ch, n] * w + g.xs[ch, n])) for n in range(5)]
        want = [(float(v), items[n]["index"], p) for v, n, p in best[ch]]
        assert got == want, f"channel {ch}"
    assert g.patches.shape[:2] == (c, 5) and g.patches.dtype == np.uint8
    assert g.class_means.shape == (c, 4)


def test_first_layer_kernels_only_on_the_first_block(tiny) -> None:
    model, items = tiny
    first = channel_gallery(model, items, layer="features.block1.relu", top=2)
    assert first.kernels is not None and first.kernels.shape == (12, 3, 3, 3)
    assert first.kernel_layer == "features.block1.conv"
    np.testing.assert_array_equal(first.kernels, model.module.features.block1.conv.weight.detach().numpy())
    assert channel_gallery(model, items, layer="features.block3.relu", top=2).kernels is None


def test_patch_is_the_receptive_field_crop(tiny) -> None:
    # features.block1.conv is a 3×3 conv with padding 1: its unit (y, x) sees pixels y-1..y+1, x-1..x+1
    # (Araujo, Norris & Sim, "Computing Receptive Fields of CNNs", Distill 2019).
    model, items = tiny
    g = channel_gallery(model, items, layer="features.block1.conv", top=3)
    assert g.rf_size == (3, 3) and g.rf_jump == (1, 1)
    ch, n = 0, 0
    y, x, i = int(g.ys[ch, n]), int(g.xs[ch, n]), int(g.items[ch, n])
    display = prepare(model.spec, read_image(Path(items[i]["path"]))).display
    if 1 <= y <= 94 and 1 <= x <= 94:
        np.testing.assert_array_equal(g.patches[ch, n], display[y - 1:y + 2, x - 1:x + 2])


def test_merge_keeps_earlier_images_on_ties() -> None:
    empty = (np.full((1, 0), -np.inf), np.zeros((1, 0), dtype=np.int64), np.zeros((1, 0), dtype=np.int64))
    state = top_units(empty, np.array([[1.0, 2.0, 2.0]]), 0, 2)
    state = top_units(state, np.array([[2.0, 0.0, 0.0]]), 1, 2)
    assert state[0].tolist() == [[2.0, 2.0]] and state[1].tolist() == [[0, 0]] and state[2].tolist() == [[1, 2]]


def test_selectivity_index() -> None:
    # common practice, no source: (best − mean of the rest) / (best + rest)
    np.testing.assert_allclose(selectivity(np.array([[1.0, 1.0, 1.0], [3.0, 1.0, 1.0], [1.0, 0.0, 0.0]])),
                               [0.0, 0.5, 1.0])


def test_bad_layer(tiny) -> None:
    model, items = tiny
    with pytest.raises(UnsupportedLayerError, match="no layer named"):
        channel_gallery(model, items, layer="features.nope", top=2)
    with pytest.raises(UnsupportedLayerError, match=r"\(N, C, h, w\)"):
        channel_gallery(model, items, layer="head", top=2)


class TestFeatureVisual:
    # Source: Olah, Mordvintsev & Schubert, "Feature Visualization", Distill 2017: gradient ascent on a
    # unit's activation with transformation robustness and a Fourier / decorrelated parameterisation.
    def _run(self, model, **kw):
        base = {"layer": "features.block2.relu", "channel": 3, "size": (32, 32), "mean": model.spec.preprocess.mean,
                    "std": model.spec.preprocess.std, "steps": 16}
        base.update(kw)
        return feature_visual(model.module, **base)

    def test_ascent_raises_the_activation(self, tiny) -> None:
        model, _ = tiny
        for param in ("fourier", "pixel"):
            v = self._run(model, parameterisation=param)
            assert v.final_activation > v.start_activation
            assert v.image.shape == (32, 32, 3) and v.image.dtype == np.uint8

    def test_seeded(self, tiny) -> None:
        model, _ = tiny
        a, b, c = self._run(model, seed=1), self._run(model, seed=1), self._run(model, seed=2)
        np.testing.assert_array_equal(a.image, b.image)
        assert not np.array_equal(a.image, c.image)
        assert a.params["seed"] == 1 and a.params["decorrelate"] is True

    def test_bad_parameters(self, tiny) -> None:
        model, _ = tiny
        with pytest.raises(BadParameterError, match="out of range"):
            self._run(model, channel=999, steps=1)
        with pytest.raises(BadParameterError, match="parameterisation"):
            self._run(model, parameterisation="wavelet")
        with pytest.raises(BadParameterError, match="steps"):
            self._run(model, steps=0)
