"""The bundled ImageNet model on open photos shipped by scikit-image."""

from __future__ import annotations

import io

import pytest
from PIL import Image

pytest.importorskip("efficientnet_lite_pytorch", reason="needs the optional imagenet extra")
skimage_data = pytest.importorskip("skimage.data")

from pellucid.core.model.bundled import bundled_spec_path  # noqa: E402
from pellucid.core.model.loading import load_model  # noqa: E402
from pellucid.core.model.preprocess import prepare, read_image  # noqa: E402
from pellucid.core.views.predict import predict  # noqa: E402

pytestmark = pytest.mark.imagenet


@pytest.fixture(scope="module")
def lite0():
    return load_model(bundled_spec_path("efficientnet-lite0"))


def _top3(model, array) -> list[str]:
    buf = io.BytesIO()
    Image.fromarray(array).save(buf, format="PNG")
    x = prepare(model.spec, read_image(buf.getvalue())).tensor
    return [c.label for c in predict(model.module, x, labels=model.labels, k=3).top]


def test_spec_agrees_with_weights(lite0):
    # Source: torchvision weights metadata ships the 1,000 ImageNet category names.
    assert lite0.num_classes == 1000 and lite0.labels[281] == "tabby"
    assert lite0.spec.preprocess.mean == (0.5, 0.5, 0.5) and len(lite0.fingerprint) == 64


def test_cat_photo_is_a_domestic_cat(lite0):
    # Source: scikit-image's bundled photo "chelsea" is a domestic cat (skimage.data docs).
    top3 = _top3(lite0, skimage_data.chelsea())
    assert {"tabby", "tiger cat", "Egyptian cat", "Persian cat", "Siamese cat"} & set(top3), top3


def test_coffee_photo_is_espresso_or_cup(lite0):
    # Source: scikit-image's bundled photo "coffee" is a cup of coffee (skimage.data docs).
    top3 = _top3(lite0, skimage_data.coffee())
    assert {"espresso", "cup", "coffee mug"} & set(top3), top3
