"""Preprocessing and EXIF against outside references: torchvision's transforms and Pillow.

The reference side of every check here is torchvision or Pillow (or a loop written in the test),
never Pellucid's own preprocessing.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision.transforms as T
from PIL import Image, ImageOps
from torchvision.transforms import InterpolationMode

from pellucid.core.model.preprocess import prepare, read_image, resize_and_crop
from pellucid.core.model.spec import ModelSpec

skimage_data = pytest.importorskip("skimage.data")

MEAN = (0.485, 0.456, 0.406)
STD = (0.229, 0.224, 0.225)
INTERPOLATIONS = {
    "nearest": InterpolationMode.NEAREST,
    "bilinear": InterpolationMode.BILINEAR,
    "bicubic": InterpolationMode.BICUBIC,
}


def _bytes(img: Image.Image, fmt: str = "PNG", **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


def _spec(*, height: int, width: int, resize=None, crop=None, interpolation: str = "bilinear",
          mean=MEAN, std=STD) -> ModelSpec:
    pre: dict = {"mean": list(mean), "std": list(std), "interpolation": interpolation}
    if resize is not None:
        pre["resize"] = resize
    if crop is not None:
        pre["crop"] = crop
    data = {"name": "t", "source": {"kind": "factory", "factory": "x:y"},
            "input": {"height": height, "width": width, "channels": 3},
            "preprocess": pre, "output": {"labels": ["a"]}}
    return ModelSpec.from_dict(data, base_dir=Path("."))


def _torchvision_eval(img: Image.Image, *, resize, crop, interpolation: str) -> tuple[np.ndarray, torch.Tensor]:
    """torchvision's classic evaluation pipeline on a Pillow image: (picture before ToTensor, tensor)."""
    steps = []
    if resize is not None:
        size = resize if isinstance(resize, int) else tuple(resize)
        steps.append(T.Resize(size, interpolation=INTERPOLATIONS[interpolation]))
    if crop is not None:
        steps.append(T.CenterCrop(tuple(crop)))
    picture = T.Compose(steps)(img) if steps else img
    tensor = T.Normalize(MEAN, STD)(T.ToTensor()(picture)).unsqueeze(0)
    return np.asarray(picture), tensor


def _random_rgb(width: int, height: int, seed: int) -> np.ndarray:
    # Smooth field plus noise: downsampling with and without antialiasing then differs clearly.
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:height, 0:width]
    base = 127 + 100 * np.sin(xx[..., None] * 0.9 + yy[..., None] * 0.4 + np.arange(3))
    return np.clip(base + rng.normal(0, 30, (height, width, 3)), 0, 255).astype(np.uint8)


# ---------------------------------------------------------------------------------------------
# Resize size rule


def test_chelsea_long_side_is_truncated_like_torchvision():
    # Source: torchvision 0.29, torchvision/transforms/functional.py, _compute_resized_output_size:
    # new_long = int(size * long / short), i.e. truncated. scikit-image's chelsea.png is 451×300,
    # so Resize(256) gives 384×256 (451 · 256 / 300 = 384.85), not the rounded 385×256.
    photo = Image.fromarray(skimage_data.chelsea())
    assert photo.size == (451, 300)
    expected = T.Resize(256)(photo)
    assert expected.size == (384, 256)
    notes: list[str] = []
    ours = resize_and_crop(photo, _spec(height=256, width=384, resize=256), notes)
    # Had Pellucid produced 385×256 it would have resized again to the input size and said so.
    assert ours.size == (384, 256)
    assert not any("aspect ratio changed" in n for n in notes), notes
    assert np.array_equal(np.asarray(ours), np.asarray(expected))


@pytest.mark.parametrize("size", [(451, 300), (300, 451), (7, 5), (5, 7), (1000, 37), (257, 255), (256, 256),
                                  (383, 255), (1, 3)])
def test_resize_output_size_matches_torchvision(size):
    # Source: torchvision 0.29, transforms.Resize with one int (shorter side) on a Pillow image.
    img = Image.fromarray(_random_rgb(*size, seed=9))
    expected = T.Resize(64)(img)
    notes: list[str] = []
    ours = resize_and_crop(img, _spec(height=expected.size[1], width=expected.size[0], resize=64), notes)
    assert ours.size == expected.size, notes
    # Pixels too: a wrong intermediate size followed by a resize to the input size would differ here.
    assert np.array_equal(np.asarray(ours), np.asarray(expected))


# ---------------------------------------------------------------------------------------------
# The full pipeline, pixel for pixel


def _landscape():
    return Image.fromarray(skimage_data.chelsea())


def _portrait():
    return Image.fromarray(np.ascontiguousarray(skimage_data.chelsea().transpose(1, 0, 2)))


def _tiny():
    return Image.fromarray(_random_rgb(5, 3, seed=1))


def _thin():
    return Image.fromarray(_random_rgb(700, 37, seed=2))


def _grey():
    return Image.fromarray(skimage_data.camera())  # 512×512 mode L


def _rgba_opaque():
    arr = np.dstack([_random_rgb(301, 203, seed=3), np.full((203, 301), 255, np.uint8)])
    return Image.fromarray(arr, mode="RGBA")


def _palette():
    return Image.fromarray(skimage_data.coffee()).convert("P", palette=Image.Palette.ADAPTIVE, colors=64)


def _sixteen_bit():
    rng = np.random.default_rng(4)
    return Image.fromarray(rng.integers(0, 65536, (233, 311), dtype=np.uint16))


def _sixteen_to_rgb(img: Image.Image) -> Image.Image:
    # common practice, no source: the full 16-bit range maps onto 0–255, rounding half up,
    # written here as integer arithmetic independent of Pellucid's float version.
    v = np.asarray(img, dtype=np.int64)
    return Image.fromarray(((v * 255 + 32767) // 65535).astype(np.uint8), mode="L").convert("RGB")


CASES = {
    # name: (make, reference RGB picture the torchvision pipeline starts from)
    "landscape": (_landscape, lambda im: im),
    "portrait": (_portrait, lambda im: im),
    "tiny": (_tiny, lambda im: im),
    "thin": (_thin, lambda im: im),
    # Source: torchvision 0.29, torchvision/datasets/folder.py, pil_loader: img.convert("RGB").
    "grey": (_grey, lambda im: im.convert("RGB")),
    "rgba-opaque": (_rgba_opaque, lambda im: im.convert("RGB")),
    "palette": (_palette, lambda im: im.convert("RGB")),
    "16-bit": (_sixteen_bit, _sixteen_to_rgb),
}


@pytest.mark.parametrize("interpolation", list(INTERPOLATIONS))
@pytest.mark.parametrize("case", list(CASES))
def test_pipeline_matches_torchvision_pixel_for_pixel(case, interpolation):
    # Source: torchvision 0.29, transforms.Compose([Resize(256, interpolation), CenterCrop(224),
    # ToTensor(), Normalize(mean, std)]) on a Pillow image, the evaluation pipeline of its model docs.
    make, to_reference = CASES[case]
    img = make()
    intake = read_image(_bytes(img))
    reference = to_reference(img)
    picture, tensor = _torchvision_eval(reference, resize=256, crop=[224, 224], interpolation=interpolation)
    ours = prepare(_spec(height=224, width=224, resize=256, crop=[224, 224], interpolation=interpolation), intake)
    assert np.array_equal(ours.display, picture)
    assert ours.tensor.dtype == torch.float32 and ours.tensor.shape == tensor.shape == (1, 3, 224, 224)
    assert torch.equal(ours.tensor, tensor), float((ours.tensor - tensor).abs().max())


@pytest.mark.parametrize(("size", "crop"), [((5, 9), (8, 8)), ((3, 3), (8, 6)), ((11, 4), (7, 7)), ((6, 6), (6, 6))])
def test_centre_crop_pads_like_torchvision(size, crop):
    # Source: torchvision 0.29, transforms.CenterCrop: an image smaller than the crop is padded with 0,
    # (crop − size) // 2 before and the rest after, then cropped at int(round((size − crop) / 2)).
    img = Image.fromarray(_random_rgb(*size, seed=5))
    picture, tensor = _torchvision_eval(img, resize=None, crop=list(crop), interpolation="bilinear")
    ours = prepare(_spec(height=crop[0], width=crop[1], crop=list(crop)), read_image(_bytes(img)))
    assert np.array_equal(ours.display, picture)
    assert torch.equal(ours.tensor, tensor)


@pytest.mark.parametrize("interpolation", list(INTERPOLATIONS))
def test_exact_size_resize_matches_torchvision(interpolation):
    # Source: torchvision 0.29, transforms.Resize((h, w)) stretches to exactly h × w.
    img = Image.fromarray(skimage_data.coffee())
    picture, tensor = _torchvision_eval(img, resize=[96, 160], crop=None, interpolation=interpolation)
    ours = prepare(_spec(height=96, width=160, resize=[96, 160], interpolation=interpolation),
                   read_image(_bytes(img)))
    assert np.array_equal(ours.display, picture)
    assert torch.equal(ours.tensor, tensor)


def test_resize_is_antialiased_like_torchvision_tensors():
    # Source: torchvision 0.29, transforms.Resize docs: on tensors, bilinear with antialias=True gives
    # results close to Pillow's; without antialiasing a strong downsample aliases.
    img = Image.fromarray(_random_rgb(640, 480, seed=6))
    ours = prepare(_spec(height=48, width=64, resize=48), read_image(_bytes(img))).display.astype(int)
    as_tensor = torch.from_numpy(np.asarray(img)).permute(2, 0, 1)
    smooth = T.Resize(48, antialias=True)(as_tensor).permute(1, 2, 0).numpy().astype(int)
    aliased = T.Resize(48, antialias=False)(as_tensor).permute(1, 2, 0).numpy().astype(int)
    assert ours.shape == smooth.shape == aliased.shape == (48, 64, 3)
    assert np.abs(ours - smooth).max() <= 1
    assert np.abs(ours - aliased).mean() > 10 * max(np.abs(ours - smooth).mean(), 0.05)


# ---------------------------------------------------------------------------------------------
# Intake conversions


def test_sixteen_bit_intake_scales_the_full_range():
    img = _sixteen_bit()
    ours = read_image(_bytes(img))
    assert ours.original_mode == "I;16"
    assert np.array_equal(np.asarray(ours.pil.convert("RGB")), np.asarray(_sixteen_to_rgb(img)))


def test_translucent_rgba_is_composited_onto_white():
    # Source: Porter & Duff, "Compositing Digital Images", SIGGRAPH 1984, "over": a·c + (1 − a)·white.
    rgb = _random_rgb(37, 23, seed=7)
    alpha = np.random.default_rng(8).integers(0, 256, (23, 37), dtype=np.uint8)
    ours = np.asarray(read_image(_bytes(Image.fromarray(np.dstack([rgb, alpha]), mode="RGBA"))).pil, dtype=float)
    a = alpha[..., None] / 255.0
    expected = a * rgb + (1 - a) * 255.0
    assert np.abs(ours - expected).max() <= 1.0


# ---------------------------------------------------------------------------------------------
# EXIF orientation


def _asymmetric(width: int = 5, height: int = 3) -> np.ndarray:
    # Every pixel distinct, so any wrong flip or rotation changes the array.
    return (np.arange(width * height * 3, dtype=np.int64).reshape(height, width, 3) * 5 % 251).astype(np.uint8)


# Source: EXIF 2.3 (JEITA CP-3451C / CIPA DC-008), tag 0x0112 Orientation: the stored picture is
# turned upright by 1 nothing, 2 mirror left-right, 3 rotate 180°, 4 mirror top-bottom, 5 transpose
# (mirror about the top-left/bottom-right diagonal), 6 rotate 90° clockwise, 7 transverse (mirror
# about the top-right/bottom-left diagonal), 8 rotate 90° anticlockwise. Written as numpy here,
# independently of Pillow and of Pellucid.
UPRIGHT = {
    1: lambda a: a,
    2: lambda a: a[:, ::-1],
    3: lambda a: a[::-1, ::-1],
    4: lambda a: a[::-1, :],
    5: lambda a: a.transpose(1, 0, 2),
    6: lambda a: np.rot90(a, k=-1),
    7: lambda a: a[::-1, ::-1].transpose(1, 0, 2),
    8: lambda a: np.rot90(a, k=1),
}


@pytest.mark.parametrize("orientation", range(1, 9))
def test_exif_orientation_matches_pillow_and_the_standard(orientation):
    arr = _asymmetric()
    exif = Image.Exif()
    exif[0x0112] = orientation
    data = _bytes(Image.fromarray(arr), "PNG", exif=exif.tobytes())
    ours = read_image(data)
    # Source: Pillow 13, PIL.ImageOps.exif_transpose on the same decoded file.
    pillow = np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(data))).convert("RGB"))
    standard = UPRIGHT[orientation](arr)
    assert np.array_equal(pillow, standard)  # the two references agree with each other
    assert np.array_equal(np.asarray(ours.pil), standard)
    assert ours.original_size == (5, 3)
    said = any(f"EXIF orientation ({orientation})" in n for n in ours.notes)
    assert said == (orientation != 1), ours.notes


def test_exif_orientation_in_a_jpeg_matches_pillow():
    # Source: Pillow 13, PIL.ImageOps.exif_transpose; the JPEG's pixels are compared after decoding.
    arr = np.repeat(np.repeat(_asymmetric(6, 4), 8, axis=0), 8, axis=1)
    exif = Image.Exif()
    exif[0x0112] = 8
    data = _bytes(Image.fromarray(arr), "JPEG", exif=exif.tobytes(), quality=95)
    ours = read_image(data)
    pillow = np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(data))))
    assert ours.pil.size == (32, 48)
    assert np.array_equal(np.asarray(ours.pil), pillow)
