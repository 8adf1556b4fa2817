"""Image intake: conversions are made and said; bad files get plain errors."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from pellucid.core.errors import ImageDecodeError, ImageTooLargeError
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.model.spec import ModelSpec


def png_bytes(img: Image.Image, fmt: str = "PNG", **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, format=fmt, **kw)
    return buf.getvalue()


def spec(channels: int = 3, **pre) -> ModelSpec:
    data = {"name": "t", "source": {"kind": "factory", "factory": "x:y"},
            "input": {"height": 8, "width": 8, "channels": channels},
            "preprocess": {"mean": [0.5] * channels, "std": [0.25] * channels, **pre},
            "output": {"labels": ["a"]}}
    from pathlib import Path

    return ModelSpec.from_dict(data, base_dir=Path("."))


def test_rgb_png_is_normalised_exactly():
    arr = np.random.default_rng(0).integers(0, 256, (8, 8, 3), dtype=np.uint8)
    p = prepare(spec(), read_image(png_bytes(Image.fromarray(arr))))
    expected = (arr.astype(np.float32) / 255 - 0.5) / 0.25
    assert p.tensor.shape == (1, 3, 8, 8)
    np.testing.assert_allclose(p.tensor[0].numpy().transpose(1, 2, 0), expected, atol=1e-6)
    assert np.array_equal(p.display, arr) and p.notes == []


# EXIF orientation is checked pixel for pixel against Pillow and the EXIF table in
# test_outside_preprocess.py.


@pytest.mark.parametrize(
    "make, note",
    [
        (lambda: Image.fromarray(np.arange(64, dtype=np.uint16).reshape(8, 8) * 1000), "I;16"),
        (lambda: Image.new("RGBA", (8, 8), (10, 20, 30, 0)), "composited onto white"),
        (lambda: Image.new("CMYK", (8, 8), (0, 0, 0, 0)), "CMYK"),
        (lambda: Image.new("P", (8, 8)), "palette image"),
    ],
)
def test_mode_conversions_are_noted(make, note):
    img = make()
    fmt = "JPEG" if img.mode == "CMYK" else "PNG"
    out = read_image(png_bytes(img, fmt))
    assert out.pil.mode in ("RGB", "L")
    assert any(note in n for n in out.notes), out.notes


def test_grayscale_to_rgb_model_and_back_are_noted():
    gray = read_image(png_bytes(Image.new("L", (8, 8), 128)))
    assert any("repeated into 3 channels" in n for n in prepare(spec(3), gray).notes)
    rgb = read_image(png_bytes(Image.new("RGB", (8, 8), (200, 10, 10))))
    p = prepare(spec(1), rgb)
    assert p.tensor.shape == (1, 1, 8, 8) and any("grayscale" in n for n in p.notes)


def test_animated_gif_uses_first_frame():
    frames = [Image.new("RGB", (8, 8), c) for c in ("red", "blue")]
    buf = io.BytesIO()
    frames[0].save(buf, format="GIF", save_all=True, append_images=frames[1:])
    out = read_image(buf.getvalue())
    assert any("first frame" in n for n in out.notes)
    assert out.pil.convert("RGB").getpixel((0, 0))[0] > 200


def test_resize_shorter_side_and_centre_crop_are_said():
    img = Image.new("RGB", (32, 16), "white")
    p = prepare(spec(resize=8, crop=[8, 8]), read_image(png_bytes(img)))
    assert p.tensor.shape == (1, 3, 8, 8)
    assert any("centre-cropped 16×8 to 8×8" in n for n in p.notes)


@pytest.mark.parametrize(
    "data, fragment",
    [
        (b"", "empty (0 bytes)"),
        (b"hello, I am a text file\n", "not an image"),
        (b'<svg xmlns="http://www.w3.org/2000/svg"></svg>', "looks like text or markup"),
    ],
)
def test_not_images(data, fragment):
    with pytest.raises(ImageDecodeError, match=None) as info:
        read_image(data, name="x.png")
    assert fragment in str(info.value)


def test_truncated_png_and_jpeg():
    arr = np.random.default_rng(1).integers(0, 256, (64, 64, 3), dtype=np.uint8)
    for fmt in ("PNG", "JPEG"):
        data = png_bytes(Image.fromarray(arr), fmt)
        with pytest.raises(ImageDecodeError, match="truncated or damaged"):
            read_image(data[: len(data) // 2])


def test_truncated_files_stay_refused_after_the_pdf_engine_loads():
    # WeasyPrint sets Pillow's process-wide LOAD_TRUNCATED_IMAGES on import; the report's PDF
    # must not make later uploads half-decode (this failed when the tests ran in file order).
    from pellucid.core.audit import report_pdf
    from pellucid.core.errors import ReportError

    try:
        report_pdf._engine()
    except ReportError:
        pytest.skip("the PDF engine is not installed here")
    data = png_bytes(Image.fromarray(np.zeros((32, 32, 3), dtype=np.uint8) + 90), "PNG")
    with pytest.raises(ImageDecodeError, match="truncated or damaged"):
        read_image(data[: len(data) // 2])


def test_decompression_bomb_is_refused_before_decoding():
    data = png_bytes(Image.new("L", (4000, 4000)))
    with pytest.raises(ImageTooLargeError, match="over the limit"):
        read_image(data, max_pixels=1_000_000)


def test_byte_limit():
    with pytest.raises(ImageTooLargeError, match="upload limit"):
        read_image(b"\x89PNG" + b"0" * 2000, max_bytes=1000)
