"""EfficientNet-Lite0's input normalisation, checked by how the weights behave on open photos.

The installed packages do not document the statistics (see demo_models/efficientnet-lite0/
MODEL_CARD.md), so the spec's mean/std are checked behaviourally: against the first BatchNorm's
running variance, and by the probability of the photos' classes, each time against ImageNet's
mean/std. Swapping ImageNet's statistics into the spec makes these tests fail.
"""

from __future__ import annotations

import dataclasses
import io

import numpy as np
import pytest
import torch
from PIL import Image

pytest.importorskip("efficientnet_lite_pytorch", reason="needs the optional imagenet extra")
skimage_data = pytest.importorskip("skimage.data")

from pellucid.core.model.bundled import bundled_spec_path  # noqa: E402
from pellucid.core.model.loading import load_model  # noqa: E402
from pellucid.core.model.preprocess import prepare, read_image  # noqa: E402

pytestmark = pytest.mark.imagenet

# Source: torchvision's model documentation, ImageNet weights transforms: mean and std on 0–1 pixels.
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)

# Source: scikit-image's documentation of skimage.data: "chelsea" is a cat, "coffee" a cup of coffee,
# "camera" a man with a camera on a tripod, "rocket" a rocket on its launch pad. ImageNet-1k names
# from torchvision's weights metadata.
CATS = {"tabby", "tiger cat", "Egyptian cat", "Persian cat", "Siamese cat"}
PHOTOS = ("chelsea", "coffee", "camera", "rocket", "astronaut")


@pytest.fixture(scope="module")
def lite0():
    return load_model(bundled_spec_path("efficientnet-lite0"))


def _with_stats(spec, mean, std):
    return dataclasses.replace(spec, preprocess=dataclasses.replace(spec.preprocess, mean=mean, std=std))


def _input(spec, photo: str) -> torch.Tensor:
    buf = io.BytesIO()
    Image.fromarray(getattr(skimage_data, photo)()).save(buf, format="PNG")
    return prepare(spec, read_image(buf.getvalue())).tensor


def _probabilities(model, spec, photo: str) -> dict[str, float]:
    with torch.no_grad():
        p = torch.softmax(model.module(_input(spec, photo)), dim=1)[0]
    return {label: float(v) for label, v in zip(model.labels, p)}


def _ranked(probs: dict[str, float]) -> list[str]:
    return sorted(probs, key=probs.get, reverse=True)


def test_first_batchnorm_expects_the_spec_statistics(lite0):
    # Source: Ioffe & Szegedy, "Batch Normalization", ICML 2015, §3.1: at inference a BN layer uses
    # running estimates of its input's mean and variance over the training data. The stem conv's
    # output on ordinary photos should therefore have about the running variance when the photos are
    # normalised as the training images were; ImageNet's std (≈ 0.23 instead of 0.5) doubles the
    # input's contrast and so roughly quadruples that variance.
    net = lite0.module

    def median_variance_ratio(spec) -> float:
        x = torch.cat([_input(spec, photo) for photo in PHOTOS])
        with torch.no_grad():
            z = net._conv_stem(x)
        running = net._bn0.running_var
        alive = running > 1e-3  # channels with no variance in training carry no information
        return float((z.var(dim=(0, 2, 3))[alive] / running[alive]).median())

    spec_ratio = median_variance_ratio(lite0.spec)
    imagenet_ratio = median_variance_ratio(_with_stats(lite0.spec, IMAGENET_MEAN, IMAGENET_STD))
    assert 0.5 < spec_ratio < 2.0, spec_ratio
    assert abs(np.log(spec_ratio)) < abs(np.log(imagenet_ratio)) - 0.5, (spec_ratio, imagenet_ratio)


@pytest.mark.parametrize(("photo", "expected"), [("chelsea", CATS), ("coffee", {"espresso"})])
def test_photo_classes_score_higher_with_the_spec_statistics(lite0, photo, expected):
    ours = _probabilities(lite0, lite0.spec, photo)
    imagenet = _probabilities(lite0, _with_stats(lite0.spec, IMAGENET_MEAN, IMAGENET_STD), photo)
    assert _ranked(ours)[0] in expected, _ranked(ours)[:5]
    mass_ours = sum(ours[c] for c in expected)
    mass_imagenet = sum(imagenet[c] for c in expected)
    assert mass_ours > mass_imagenet + 0.02, (mass_ours, mass_imagenet)


@pytest.mark.parametrize(("photo", "expected", "k"), [("camera", {"tripod"}, 1),
                                                       ("rocket", {"missile", "projectile"}, 5)])
def test_more_photos_are_recognised_with_the_spec_statistics(lite0, photo, expected, k):
    # Not compared with ImageNet's statistics: on these two photos the margins are small either way
    # (the rocket's "missile" even scores a little higher with ImageNet's), so they only check rank.
    ranked = _ranked(_probabilities(lite0, lite0.spec, photo))
    assert expected & set(ranked[:k]), ranked[:5]
