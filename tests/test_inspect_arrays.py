"""`pellucid inspect` writes every map's numbers as float32 .npy files that hold the maps themselves.

The reference numbers are computed here, independently of Pellucid's engines: the occlusion grid by
a plain loop (Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014,
§4.2: one forward per occluded copy), gradient saliency by autograd (Simonyan, Vedaldi, Zisserman,
"Deep Inside Convolutional Networks", arXiv:1312.6034, 2013, §3: max over channels of |∂S/∂x|).
The .npy format is numpy's own (read back with ``np.load``).
"""

from __future__ import annotations

import json

import numpy as np
import torch
from PIL import Image

from pellucid.cli import main
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image


def test_inspect_writes_float32_arrays_of_the_maps(tmp_path, tiny_spec, capsys):
    img = tmp_path / "tile.png"
    rng = np.random.default_rng(3)
    Image.fromarray(rng.integers(0, 256, (32, 32, 3), dtype=np.uint8)).save(img)
    out = tmp_path / "out"
    code = main(["inspect", str(img), "--model", str(tiny_spec), "--out", str(out), "--patch", "8", "--stride", "4",
                 "--engine", "batched", "--method", "saliency", "--quiet"])
    assert code == 0, capsys.readouterr().err
    result = json.loads((out / "result.json").read_text())
    arrays = result["arrays"]
    assert set(arrays) == {"occlusion.npy", "occlusion_grid.npy", "saliency.npy"}

    drop, grid, sal = (np.load(out / n, allow_pickle=False) for n in ("occlusion.npy", "occlusion_grid.npy",
                                                                      "saliency.npy"))
    assert drop.dtype == grid.dtype == sal.dtype == np.float32
    assert drop.shape == sal.shape == (32, 32)  # input resolution
    tops = list(range(0, 32 - 8 + 1, 4))  # 0, 4, …, 24: the last one is flush with the border
    assert grid.shape == (len(tops), len(tops)) and arrays["occlusion_grid.npy"]["shape"] == [7, 7]

    model = load_model(tiny_spec)
    x = prepare(model.spec, read_image(img)).tensor
    with torch.no_grad():
        clean = torch.softmax(model.module(x)[0].double(), 0)
    target = int(clean.argmax())
    fill = x.mean(dim=(2, 3), keepdim=True)  # the image's mean colour, the default fill
    ref = np.zeros((len(tops), len(tops)))
    with torch.no_grad():
        for i, t in enumerate(tops):
            for j, left in enumerate(tops):
                xo = x.clone()
                xo[:, :, t : t + 8, left : left + 8] = fill
                ref[i, j] = float(clean[target] - torch.softmax(model.module(xo)[0].double(), 0)[target])
    np.testing.assert_allclose(grid, ref, atol=1e-6)
    # the per-pixel map is the mean of the grid over the positions covering each pixel
    total, count = np.zeros((32, 32)), np.zeros((32, 32))
    for i, t in enumerate(tops):
        for j, left in enumerate(tops):
            total[t : t + 8, left : left + 8] += ref[i, j]
            count[t : t + 8, left : left + 8] += 1
    np.testing.assert_allclose(drop, total / count, atol=1e-6)

    xg = x.clone().requires_grad_(True)
    model.module(xg)[0, target].backward()
    np.testing.assert_allclose(sal, xg.grad[0].abs().amax(0).numpy(), rtol=1e-5, atol=1e-7)
