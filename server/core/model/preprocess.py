"""Image intake and preprocessing.

Intake (:func:`read_image`) turns bytes or a file into a Pillow image the model can take, and
records every conversion it made (EXIF rotation, dropped alpha, 16-bit scaling, first frame of an
animation) as a plain note, because a silent conversion is a common source of wrong maps.
:func:`prepare` then applies the spec's preprocessing exactly, and keeps the resized/cropped
picture so the user sees what the model saw.

What :func:`prepare` reproduces, pixel for pixel, is torchvision's classic evaluation pipeline on a
Pillow image (``transforms`` v1; v2 takes the same path for Pillow input), because that is how most
classifiers are trained and evaluated:

- ``Resize(side, interpolation)`` for ``resize = side``: the shorter side becomes ``side`` and the
  longer one ``int(side * long / short)``, truncated, not rounded (torchvision
  ``transforms/functional.py``, ``_compute_resized_output_size``); a 451×300 photo with side 256
  becomes 384×256. ``resize = [h, w]`` is ``Resize((h, w))``. On Pillow images torchvision calls
  Pillow's own ``resize`` with the mapped filter (nearest, bilinear, bicubic), so antialiasing is
  always on; so does Pellucid.
- ``CenterCrop((h, w))``: offsets ``int(round((size - crop) / 2))`` and, when the image is smaller
  than the crop, zero padding of ``(crop - size) // 2`` before (left/top) and the rest after.
- ``ToTensor()`` then ``Normalize(mean, std)``: uint8 / 255 in float32, then (x − mean) / std.

Not reproduced: resizing a *tensor* (torchvision's tensor bicubic kernel and tensor "nearest" differ
from Pillow's; bilinear with ``antialias=True`` stays within one grey level of it), and intake's own
choices made before the pipeline: EXIF orientation applied (as Pillow's ``ImageOps.exif_transpose``),
transparent pixels composited onto white (``convert("RGB")`` would drop alpha instead), 16-bit
greys scaled to 8 bits, grey repeated into three channels. Pellucid adds one step torchvision does not:
if the spec's resize and crop do not end at the model's input size, a final resize reaches it, with a note.
"""

from __future__ import annotations

import hashlib
import io
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch
from PIL import Image, ImageOps, UnidentifiedImageError

from pellucid.core.errors import ImageDecodeError, ImageTooLargeError
from pellucid.core.model.spec import ModelSpec

# Defaults chosen for a local tool: large enough for camera photos, small enough that a crafted
# "decompression bomb" cannot exhaust memory before we refuse it.
MAX_IMAGE_BYTES = 32 * 1024 * 1024
MAX_IMAGE_PIXELS = 40_000_000

_RESAMPLE = {
    "nearest": Image.Resampling.NEAREST,
    "bilinear": Image.Resampling.BILINEAR,
    "bicubic": Image.Resampling.BICUBIC,
}


@dataclass
class IntakeImage:
    """A decoded image in mode RGB or L, with what intake changed about it."""

    pil: Image.Image
    sha256: str
    name: str
    original_size: tuple[int, int]  # (width, height) as stored in the file
    original_mode: str
    format: str | None
    notes: list[str] = field(default_factory=list)


@dataclass
class PreparedInput:
    """What the model receives: ``tensor`` (1, C, H, W) normalised, and ``display`` (H, W, 3) uint8."""

    tensor: torch.Tensor
    display: np.ndarray
    image_sha256: str
    notes: list[str]


def read_image(
    source: bytes | str | Path,
    *,
    name: str | None = None,
    max_bytes: int = MAX_IMAGE_BYTES,
    max_pixels: int = MAX_IMAGE_PIXELS,
) -> IntakeImage:
    """Decode an image from bytes or a path; raises ImageDecodeError with a plain message."""
    if isinstance(source, (str, Path)):
        path = Path(source)
        name = name or path.name
        if not path.is_file():
            raise ImageDecodeError(f"image {str(path)!r} does not exist or is not a file")
        size = path.stat().st_size
        if size > max_bytes:
            raise ImageTooLargeError(_too_big_bytes(name, size, max_bytes))
        data = path.read_bytes()
    else:
        data = bytes(source)
        name = name or "upload"
    if len(data) == 0:
        raise ImageDecodeError(f"{name!r} is empty (0 bytes); expected a PNG, JPEG, GIF, BMP, TIFF or WebP image")
    if len(data) > max_bytes:
        raise ImageTooLargeError(_too_big_bytes(name, len(data), max_bytes))

    digest = hashlib.sha256(data).hexdigest()
    notes: list[str] = []
    try:
        with warnings.catch_warnings():
            # Pillow's own bomb warning would be an error under strict settings; we check the size ourselves.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data))
            width, height = img.size
            if width * height > max_pixels:
                raise ImageTooLargeError(
                    f"{name!r} is {width}×{height} = {width * height:,} pixels, over the limit of {max_pixels:,}; "
                    "resize it first (this limit guards against decompression bombs)"
                )
            fmt = img.format
            original_mode = img.mode
            if getattr(img, "is_animated", False):
                notes.append(f"animated {fmt} with {getattr(img, 'n_frames', '?')} frames: the first frame is used")
                img.seek(0)
            img.load()
    except ImageDecodeError:
        raise
    except Image.DecompressionBombError:
        raise ImageTooLargeError(
            f"{name!r} declares too many pixels (a possible decompression bomb); the limit is {max_pixels:,}"
        ) from None
    except UnidentifiedImageError:
        start = data[:16].lstrip()[:8]
        hint = " (it looks like text or markup)" if start[:1] in (b"<", b"{", b"#") or start.isascii() else ""
        raise ImageDecodeError(
            f"{name!r} is not an image Pellucid can read{hint}; expected PNG, JPEG, GIF, BMP, TIFF or WebP"
        ) from None
    except (OSError, SyntaxError, ValueError) as exc:
        raise ImageDecodeError(f"{name!r} is truncated or damaged and cannot be decoded ({exc})") from None

    img = _honour_exif(img, notes)
    img = _to_model_mode(img, notes)
    return IntakeImage(
        pil=img,
        sha256=digest,
        name=name,
        original_size=(width, height),
        original_mode=original_mode,
        format=fmt,
        notes=notes,
    )


def _too_big_bytes(name: str, size: int, limit: int) -> str:
    return f"{name!r} is {size / 1e6:.1f} MB, over the upload limit of {limit / 1e6:.0f} MB"


def _honour_exif(img: Image.Image, notes: list[str]) -> Image.Image:
    try:
        orientation = img.getexif().get(0x0112, 1)
    except Exception:  # noqa: BLE001 - broken EXIF must not block the image itself
        notes.append("the EXIF block is damaged and was ignored")
        return img
    if orientation not in (None, 1):
        img = ImageOps.exif_transpose(img)
        notes.append(f"rotated/flipped upright as its EXIF orientation ({orientation}) says")
    return img


def _to_model_mode(img: Image.Image, notes: list[str]) -> Image.Image:
    """Bring any Pillow mode to RGB or L, saying what changed."""
    mode = img.mode
    if mode in ("RGB", "L"):
        return img
    if mode in ("I;16", "I;16B", "I;16L", "I;16N", "I", "F"):
        arr = np.asarray(img, dtype=np.float64)
        hi = float(arr.max())
        scale = 65535.0 if mode.startswith("I;16") else max(hi, 1.0)
        notes.append(f"{mode} image scaled from 0–{scale:g} to 8 bits")
        arr8 = np.clip(arr / scale * 255.0 + 0.5, 0, 255).astype(np.uint8)
        return Image.fromarray(arr8, mode="L")
    if mode == "P":
        has_alpha = "transparency" in img.info
        img = img.convert("RGBA" if has_alpha else "RGB")
        notes.append("palette image converted to RGB" + (" (with transparency)" if has_alpha else ""))
        mode = img.mode
        if mode == "RGB":
            return img
    if mode in ("RGBA", "LA", "PA", "RGBa", "La"):
        rgba = img.convert("RGBA")
        alpha = np.asarray(rgba)[..., 3]
        if alpha.min() < 255:
            notes.append("transparent pixels composited onto white; the alpha channel is not seen by the model")
        else:
            notes.append("alpha channel dropped (it was fully opaque)")
        background = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return Image.alpha_composite(background, rgba).convert("RGB")
    if mode == "CMYK":
        notes.append("CMYK image converted to RGB (colours may shift slightly)")
        return img.convert("RGB")
    if mode == "1":
        notes.append("1-bit image converted to 8-bit grayscale")
        return img.convert("L")
    notes.append(f"{mode} image converted to RGB")
    return img.convert("RGB")


def resize_and_crop(img: Image.Image, spec: ModelSpec, notes: list[str]) -> Image.Image:
    """Apply the spec's resize and centre crop; reach the model's input size exactly."""
    pre = spec.preprocess
    target_h, target_w = spec.input.height, spec.input.width
    resample = _RESAMPLE[pre.interpolation]
    w, h = img.size
    source_w, source_h = w, h
    if pre.resize is not None:
        if len(pre.resize) == 1:
            side = pre.resize[0]
            # torchvision truncates the long side (int, not round): 451×300 → 384×256, not 385×256.
            if w <= h:
                new_w, new_h = side, int(side * h / w)
            else:
                new_w, new_h = int(side * w / h), side
        else:
            new_h, new_w = pre.resize
            if abs((new_w / new_h) - (w / h)) > 0.01:
                notes.append(f"aspect ratio changed: {w}×{h} stretched to {new_w}×{new_h} as the spec's resize says")
        if (new_w, new_h) != (w, h):
            img = img.resize((new_w, new_h), resample)
    if pre.crop is not None:
        crop_h, crop_w = pre.crop
        w, h = img.size
        if crop_w > w or crop_h > h:
            # Pad like torchvision's center_crop would, but say so.
            notes.append(f"image smaller than the {crop_w}×{crop_h} crop: padded with black")
            canvas = Image.new(img.mode, (max(w, crop_w), max(h, crop_h)))
            canvas.paste(img, ((canvas.width - w) // 2, (canvas.height - h) // 2))
            img, w, h = canvas, canvas.width, canvas.height
        left = round((w - crop_w) / 2.0)
        top = round((h - crop_h) / 2.0)
        if (crop_w, crop_h) != (w, h):
            notes.append(f"centre-cropped {w}×{h} to {crop_w}×{crop_h}: the border outside is not seen by the model")
        img = img.crop((left, top, left + crop_w, top + crop_h))
    if img.size != (target_w, target_h):
        w, h = img.size
        if abs((target_w / target_h) - (w / h)) > 0.01:
            notes.append(f"aspect ratio changed: {w}×{h} resized to the model's {target_w}×{target_h}")
        img = img.resize((target_w, target_h), resample)
    if pre.resize is not None or img.size != (source_w, source_h):
        _note_enlargement(source_w, source_h, pre, target_w, target_h, notes)
    return img


def _note_enlargement(w: int, h: int, pre, target_w: int, target_h: int, notes: list[str]) -> None:
    """Say so when the model sees more pixels than the file has: a map's fine detail is then invented."""
    if pre.resize is not None and len(pre.resize) == 1:
        scale = pre.resize[0] / min(w, h)
    elif pre.resize is not None:
        scale = max(pre.resize[0] / h, pre.resize[1] / w)
    else:
        scale = max(target_h / h, target_w / w)
    if scale > 1.0:
        notes.append(
            f"enlarged {scale:.1f}× from {w}×{h}: the image has fewer pixels than the model's "
            f"{target_w}×{target_h} input, so fine detail in the maps is interpolated, not in the file"
        )


def prepare(spec: ModelSpec, image: IntakeImage) -> PreparedInput:
    """Preprocess an intake image exactly as the spec says.

    Returns the normalised tensor (1, C, H, W) float32 and the display picture (H, W, 3) uint8.
    """
    notes = list(image.notes)
    img = image.pil
    channels = spec.input.channels
    if channels == 3 and img.mode == "L":
        notes.append("grayscale image repeated into 3 channels for this RGB model")
        img = img.convert("RGB")
    elif channels == 1 and img.mode == "RGB":
        notes.append("colour image converted to grayscale (ITU-R 601 luma) for this 1-channel model")
        img = img.convert("L")
    img = resize_and_crop(img, spec, notes)
    arr = np.asarray(img, dtype=np.float32) / 255.0
    if arr.ndim == 2:
        arr = arr[..., None]
    mean = np.asarray(spec.preprocess.mean, dtype=np.float32)
    std = np.asarray(spec.preprocess.std, dtype=np.float32)
    tensor = torch.from_numpy(((arr - mean) / std).transpose(2, 0, 1).copy()).unsqueeze(0)
    display = np.asarray(img.convert("RGB"), dtype=np.uint8).copy()
    return PreparedInput(tensor=tensor, display=display, image_sha256=image.sha256, notes=notes)


def denormalise(spec: ModelSpec, tensor: torch.Tensor) -> np.ndarray:
    """Undo the spec's normalisation: (1, C, H, W) tensor → (H, W, 3) uint8 picture."""
    x = tensor.detach().cpu()[0].numpy().transpose(1, 2, 0)
    mean = np.asarray(spec.preprocess.mean, dtype=np.float32)
    std = np.asarray(spec.preprocess.std, dtype=np.float32)
    arr = np.clip((x * std + mean) * 255.0 + 0.5, 0, 255).astype(np.uint8)
    if arr.shape[2] == 1:
        arr = np.repeat(arr, 3, axis=2)
    return arr


def normalised_constant(spec: ModelSpec, value01: float) -> torch.Tensor:
    """The (1, C, 1, 1) tensor that a uniform image of intensity ``value01`` (0..1) becomes."""
    mean = torch.tensor(spec.preprocess.mean, dtype=torch.float32)
    std = torch.tensor(spec.preprocess.std, dtype=torch.float32)
    return ((value01 - mean) / std).view(1, -1, 1, 1)
