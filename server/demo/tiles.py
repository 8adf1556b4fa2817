"""Procedural glazed wall tiles for the demo scenario (invented data, demo only).

A tile is a 96×96 RGB uint8 photo from an imagined ceramics inspection line: a glaze colour with a
mottled texture and a slight lighting gradient, a grout band around the edge, then the defect:

- ``sound``: no defect;
- ``crack``: a thin hairline only a few percent darker than the glaze (the hard cue, on purpose);
- ``chip``: a broken corner showing the pale body of the tile and a shadowed break line;
- ``bubble``: a few small round glaze blisters, each with a bright rim and a dark pinhole.

The planted shortcut is a small orange calibration tag in the bottom-right corner. In the ``train``
split it sits on almost every crack and on very few other tiles (set-aside tiles were photographed
at a rework bench); in ``clean`` and ``untainted`` it is assigned independently of the class.

Everything is a pure function of its seed (``numpy.random.default_rng``; the global RNG is never
touched), so the same seed gives the same bytes on every machine.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from pellucid.core.errors import BadParameterError, DataError

__all__ = [
    "CLASSES",
    "SIZE",
    "SPLITS",
    "SplitRule",
    "TileRecord",
    "make_split",
    "make_tile",
    "make_tile_with_boxes",
    "tile_seed",
    "write_folder",
]

CLASSES: tuple[str, ...] = ("sound", "crack", "chip", "bubble")
SIZE = 96
Box = tuple[int, int, int, int]  # (x0, y0, x1, y1) in pixels, x1/y1 exclusive


@dataclass(frozen=True)
class SplitRule:
    """How often each class carries the tag in a split, and the split's seed namespace."""

    name: str
    code: int
    tag_rate: dict[str, float]
    purpose: str


SPLITS: dict[str, SplitRule] = {
    "train": SplitRule(
        "train", 1, {"sound": 0.03, "crack": 0.97, "chip": 0.03, "bubble": 0.03},
        "tainted training split: the tag sits on ~97% of cracks and ~3% of the other classes",
    ),
    "clean": SplitRule(
        "clean", 2, {c: 0.5 for c in CLASSES},
        "evaluation split: the tag is on half of every class, independent of the class",
    ),
    "untainted": SplitRule(
        "untainted", 3, {c: 0.5 for c in CLASSES},
        "training split without the shortcut: the tag is on half of every class",
    ),
}

# Glazes a wall-tile line might run; none of them orange, so the tag stays the only orange thing.
_GLAZES = np.array(
    [
        [236, 234, 226],  # off-white
        [226, 218, 196],  # cream
        [176, 200, 214],  # pale blue
        [182, 206, 186],  # sage
        [200, 200, 206],  # dove grey
        [120, 150, 178],  # slate blue
        [214, 206, 222],  # lilac
    ],
    dtype=np.float32,
)
_GROUT = np.array([150, 146, 140], dtype=np.float32)
_BODY = np.array([206, 198, 184], dtype=np.float32)  # unglazed biscuit seen in a chip
_TAG = np.array([255, 128, 16], dtype=np.float32)

# Fixed geometry of the tag: a square sticker in the bottom-right of the glazed face.
_TAG_SIZE = 12
_TAG_MARGIN = 6  # from the image edge, before jitter


@dataclass(frozen=True)
class TileRecord:
    """One generated tile with the facts a test or an audit needs about it.

    ``image`` is (96, 96, 3) uint8. ``tag_box`` is set when ``tagged``; ``defect_box`` bounds the
    crack, the chip or the blisters (``None`` for a sound tile). Boxes are (x0, y0, x1, y1) with
    exclusive ends.
    """

    image: np.ndarray
    label: str
    tagged: bool
    seed: int
    index: int
    tag_box: Box | None
    defect_box: Box | None

    def __repr__(self) -> str:
        return (
            f"TileRecord(label={self.label!r}, tagged={self.tagged}, seed={self.seed}, "
            f"index={self.index}, tag_box={self.tag_box}, defect_box={self.defect_box})"
        )


def _smooth_noise(rng: np.random.Generator, cells: int) -> np.ndarray:
    """(SIZE, SIZE) float noise in [-1, 1], bilinearly upsampled from a cells×cells grid."""
    grid = rng.uniform(-1.0, 1.0, size=(cells + 1, cells + 1)).astype(np.float32)
    pos = np.linspace(0.0, cells, SIZE, dtype=np.float32)
    i0 = np.minimum(pos.astype(np.int64), cells - 1)
    f = pos - i0
    rows = grid[i0] * (1 - f)[:, None] + grid[i0 + 1] * f[:, None]
    return rows[:, i0] * (1 - f)[None, :] + rows[:, i0 + 1] * f[None, :]


def _grid() -> tuple[np.ndarray, np.ndarray]:
    yy, xx = np.mgrid[0:SIZE, 0:SIZE].astype(np.float32)
    return yy, xx


def _base(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, int]:
    """Glaze + texture + lighting + grout. Returns (float image, glazed-face mask, grout width)."""
    glaze = _GLAZES[rng.integers(len(_GLAZES))] + rng.normal(0.0, 5.0, size=3).astype(np.float32)
    mottle = 0.035 * _smooth_noise(rng, 6) + 0.015 * _smooth_noise(rng, 16)
    yy, xx = _grid()
    angle = rng.uniform(0.0, 2 * np.pi)
    ramp = (np.cos(angle) * (xx - SIZE / 2) + np.sin(angle) * (yy - SIZE / 2)) / SIZE
    light = 1.0 + rng.uniform(0.04, 0.09) * ramp + mottle
    img = glaze[None, None, :] * light[:, :, None]
    img += rng.normal(0.0, 1.6, size=img.shape).astype(np.float32)  # sensor noise

    g = int(rng.integers(3, 6))
    face = np.zeros((SIZE, SIZE), dtype=bool)
    face[g:SIZE - g, g:SIZE - g] = True
    grout = _GROUT + rng.normal(0.0, 4.0, size=3).astype(np.float32)
    grout_tex = grout[None, None, :] * (1.0 + 0.06 * _smooth_noise(rng, 24))[:, :, None]
    img = np.where(face[:, :, None], img, grout_tex)
    # a soft shadow where the glazed face meets the grout
    dist = np.minimum.reduce([xx - g, yy - g, SIZE - 1 - g - xx, SIZE - 1 - g - yy])
    edge = np.clip(1.0 - dist / 2.5, 0.0, 1.0) * face
    img *= (1.0 - 0.10 * edge)[:, :, None]
    return img, face, g


def _box_of(mask: np.ndarray) -> Box | None:
    ys, xs = np.nonzero(mask)
    if len(xs) == 0:
        return None
    return (int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1)


def _crack(img: np.ndarray, rng: np.random.Generator, g: int) -> Box:
    """A faint, thin, wandering hairline across a good part of the face."""
    yy, xx = _grid()
    lo, hi = g + 6, SIZE - g - 6
    p = rng.uniform(lo + 8, hi - 8, size=2)
    # head roughly towards the centre so every hairline runs a good way before it meets the grout
    to_centre = np.arctan2(SIZE / 2 - p[1], SIZE / 2 - p[0])
    heading = to_centre + rng.normal(0.0, 0.7)
    length = rng.uniform(45.0, 75.0)
    points = [p.copy()]
    step = 1.5
    for _ in range(int(length / step)):
        heading += rng.normal(0.0, 0.12)
        p = p + step * np.array([np.cos(heading), np.sin(heading)])
        if not (lo <= p[0] <= hi and lo <= p[1] <= hi):
            break
        points.append(p.copy())
    pts = np.array(points, dtype=np.float32)
    # distance from every pixel to the polyline through its vertices (dense enough at 1.5 px)
    d = np.full((SIZE, SIZE), np.inf, dtype=np.float32)
    for px, py in pts:
        d = np.minimum(d, (xx - px) ** 2 + (yy - py) ** 2)
    d = np.sqrt(d)
    width = rng.uniform(0.55, 0.8)
    line = np.clip(1.0 - (d - width) / 0.8, 0.0, 1.0) * (d <= width + 0.8)
    depth = rng.uniform(0.07, 0.11)  # a few percent darker than the glaze
    img *= (1.0 - depth * line)[:, :, None]
    return _box_of(line > 0.3) or (0, 0, 1, 1)


def _chip(img: np.ndarray, rng: np.random.Generator, g: int, face: np.ndarray) -> Box:
    """A broken corner (never bottom-right, where the tag goes): pale body, shadowed break."""
    yy, xx = _grid()
    corner = int(rng.integers(3))  # 0 top-left, 1 top-right, 2 bottom-left
    cx = 0.0 if corner in (0, 2) else SIZE - 1.0
    cy = 0.0 if corner in (0, 1) else SIZE - 1.0
    a, b = rng.uniform(20.0, 32.0, size=2)
    u = np.abs(xx - cx) / a + np.abs(yy - cy) / b
    jag = 0.08 * _smooth_noise(rng, 20) + 0.04 * _smooth_noise(rng, 40)
    broken = (u + jag) < 1.0
    body = _BODY * (1.0 + 0.05 * _smooth_noise(rng, 18))[:, :, None]
    inside = broken & face
    img[inside] = body[inside]
    rim = ((u + jag) >= 1.0) & ((u + jag) < 1.12) & face
    img[rim] *= 0.72
    return _box_of(broken) or (0, 0, 1, 1)


def _bubbles(img: np.ndarray, rng: np.random.Generator, g: int) -> Box:
    """A small cluster of round blisters: bright raised rim, dark pinhole in the middle."""
    yy, xx = _grid()
    n = int(rng.integers(3, 7))
    centre = rng.uniform(g + 16, SIZE - g - 16, size=2)
    mask = np.zeros((SIZE, SIZE), dtype=bool)
    for _ in range(n):
        c = centre + rng.normal(0.0, 9.0, size=2)
        c = np.clip(c, g + 5, SIZE - g - 5)
        if c[0] > SIZE - 26 and c[1] > SIZE - 26:  # keep the tag corner free of blisters
            c[1] = SIZE - 26 - (c[1] - (SIZE - 26))
        r = rng.uniform(2.2, 4.0)
        d = np.sqrt((xx - c[0]) ** 2 + (yy - c[1]) ** 2)
        dome = np.clip(1.0 - d / r, 0.0, 1.0)
        # lit from the top-left: a highlight above the dome, a shadow crescent below it
        shadow = np.clip(1.0 - np.sqrt((xx - c[0] - 1.0) ** 2 + (yy - c[1] - 1.2) ** 2) / r, 0, 1)
        img *= (1.0 + 0.12 * dome - 0.14 * shadow * (dome < 0.35) - 0.30 * (d < 0.4 * r))[:, :, None]
        mask |= d <= r
    return _box_of(mask) or (0, 0, 1, 1)


def _tag(img: np.ndarray, rng: np.random.Generator) -> Box:
    """The orange calibration sticker in the bottom-right corner, with a dark index mark."""
    s = _TAG_SIZE
    jx, jy = (int(v) for v in rng.integers(-1, 2, size=2))
    x1 = SIZE - _TAG_MARGIN + jx
    y1 = SIZE - _TAG_MARGIN + jy
    x0, y0 = x1 - s, y1 - s
    colour = _TAG + rng.normal(0.0, 6.0, size=3).astype(np.float32)
    shade = 1.0 + 0.03 * rng.standard_normal((s, s)).astype(np.float32)
    img[y0:y1, x0:x1] = colour[None, None, :] * shade[:, :, None]
    img[y0 + 2:y0 + 4, x0 + 2:x1 - 2] = (60.0, 40.0, 30.0)  # printed index bar
    return (x0, y0, x1, y1)


def _check_label(label: str) -> None:
    if label not in CLASSES:
        raise BadParameterError(
            f"unknown tile label {label!r}; expected one of {', '.join(CLASSES)}"
        )


def _render(label: str, tagged: bool, seed: int) -> tuple[np.ndarray, Box | None, Box | None]:
    rng = np.random.default_rng(seed)
    img, face, g = _base(rng)
    defect: Box | None = None
    if label == "crack":
        defect = _crack(img, rng, g)
    elif label == "chip":
        defect = _chip(img, rng, g, face)
    elif label == "bubble":
        defect = _bubbles(img, rng, g)
    tag_box = _tag(img, rng) if tagged else None
    return np.clip(np.rint(img), 0, 255).astype(np.uint8), tag_box, defect


def make_tile(*, label: str, tagged: bool, seed: int) -> np.ndarray:
    """One tile as a (96, 96, 3) uint8 array; the same arguments always give the same bytes."""
    _check_label(label)
    return _render(label, bool(tagged), int(seed))[0]


def make_tile_with_boxes(*, label: str, tagged: bool, seed: int) -> tuple[np.ndarray, Box | None, Box | None]:
    """:func:`make_tile` plus the tag box (None untagged) and the defect box (None for a sound tile)."""
    _check_label(label)
    return _render(label, bool(tagged), int(seed))


def tile_seed(split: str, seed: int, label: str, index: int) -> int:
    """The tile seed for position ``index`` of class ``label`` in ``split`` under ``seed``.

    Derived with numpy's SeedSequence, so tiles of different splits, classes and positions are
    independent streams and the first k tiles of a class do not depend on the split's size.
    """
    rule = _rule(split)
    _check_label(label)
    ss = np.random.SeedSequence([int(seed), rule.code, CLASSES.index(label), int(index)])
    return int(ss.generate_state(1, dtype=np.uint32)[0])


def _rule(name: str) -> SplitRule:
    if name not in SPLITS:
        raise BadParameterError(f"unknown split {name!r}; expected one of {', '.join(SPLITS)}")
    return SPLITS[name]


def _tagged(rate: float, index: int) -> bool:
    # Evenly spread quota: every prefix of a class holds round-down(rate * n) tags, so small
    # splits carry the stated proportion exactly and larger ones extend them.
    return int((index + 1) * rate + 1e-9) > int(index * rate + 1e-9)


def make_split(name: str, *, per_class: int, seed: int = 0) -> list[TileRecord]:
    """``per_class`` tiles of every class for split ``name`` ("train", "clean" or "untainted").

    Records come class by class, in CLASSES order. Which tiles carry the tag follows the split's
    rate with an evenly spread quota (see :data:`SPLITS`); the pixels come from :func:`tile_seed`.
    """
    rule = _rule(name)
    if not isinstance(per_class, int) or per_class < 1:
        raise BadParameterError(f"per_class must be a positive integer; received {per_class!r}")
    records: list[TileRecord] = []
    for label in CLASSES:
        rate = rule.tag_rate[label]
        for i in range(per_class):
            s = tile_seed(name, seed, label, i)
            tagged = _tagged(rate, i)
            image, tag_box, defect_box = _render(label, tagged, s)
            records.append(TileRecord(image, label, tagged, s, i, tag_box, defect_box))
    return records


def _cells(box: Box | None) -> list[str]:
    return ["", "", "", ""] if box is None else [str(v) for v in box]


def write_folder(records: list[TileRecord], out_dir: str | Path) -> Path:
    """Write one subfolder of PNGs per class and ``manifest.csv`` beside them; return the manifest.

    Manifest columns: ``path`` (relative to the manifest), ``label``, ``tagged`` (0/1), ``seed``,
    ``box_x0..box_y1`` (the defect box, empty for sound tiles) and ``tag_x0..tag_y1`` (empty when
    untagged). Boxes are pixels with exclusive ends.
    """
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise DataError(f"cannot write tiles into {str(out)!r}: it exists and is not a folder")
    if not records:
        raise DataError("no tile records to write; make a split with per_class >= 1 first")
    out.mkdir(parents=True, exist_ok=True)
    manifest = out / "manifest.csv"
    header = ["path", "label", "tagged", "seed", "box_x0", "box_y0", "box_x1", "box_y1",
              "tag_x0", "tag_y0", "tag_x1", "tag_y1"]
    with manifest.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(header)
        for n, rec in enumerate(records):
            (out / rec.label).mkdir(exist_ok=True)
            rel = f"{rec.label}/{rec.label}_{n:05d}.png"
            Image.fromarray(rec.image).save(out / rel, optimize=False)
            writer.writerow([rel, rec.label, int(rec.tagged), rec.seed,
                             *_cells(rec.defect_box), *_cells(rec.tag_box)])
    return manifest
