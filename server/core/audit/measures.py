"""Where an attribution map puts its evidence: object share, pointing game, standard regions.

All measures read the map's positive part (the evidence *for* the explained class): for signed
maps such as occlusion that is the area whose hiding lowers the probability.

- ``object_share``: share of the positive mass inside the object (its mask, else its box).
- ``pointing_hit``: Zhang et al., "Top-down Neural Attention by Excitation Backprop", ECCV 2016
  (IJCV 2018): a hit when the map's maximum lies on the object, within a tolerance of 15 px.
- ``energy_pointing``: Wang et al., "Score-CAM", CVPR Workshops 2020, §4.3: share of the map's
  energy inside the object's bounding box. With a box and no mask it equals ``object_share``.
- region shares: the border band, each corner box and the centre box; always computed, because a
  shortcut (a stamp, a ruler, a frame) usually sits in one of them. ``regions_off_object`` counts
  only the evidence in a region that lies outside the object when boxes or masks were given
  (equal to ``regions`` without them): an object in a corner is not a shortcut, a mark beside it
  may be.

Everything scales with the input (the rule, stated once):

- pointing tolerance = 15/224 of the input's shorter side. Zhang et al.'s 15 px are for inputs of
  about 224 px, so a 224×224 input keeps 15 px, a 32×32 input gets 2.1 px and a 448×448 input
  30 px. A fixed 15 px on a 32 px input would count nearly every peak as a hit.
- corner box = 1/4 of each side, border band = 1/16 of the shorter side, centre box = 1/2 of each
  side (Pellucid's own defaults; each at least 1 px, rounded to whole pixels), recorded with every
  run as fractions.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from pellucid.core.errors import BadParameterError

__all__ = [
    "CORNERS",
    "POINTING_TOLERANCE",
    "POINTING_TOLERANCE_FRACTION",
    "REGIONS",
    "ImageMeasures",
    "RegionLayout",
    "box_mask",
    "energy_pointing",
    "measure_map",
    "pointing_hit",
    "pointing_tolerance",
    "positive_part",
    "region_masks",
    "share_inside",
]

CORNERS = ("top_left", "top_right", "bottom_left", "bottom_right")
REGIONS = ("border", *CORNERS, "centre")
# Zhang et al. (ECCV 2016) count a hit within 15 pixels of the annotated object, on inputs of
# about 224 px; Pellucid keeps that share of the input's shorter side.
POINTING_TOLERANCE = 15.0
POINTING_REFERENCE_SIDE = 224.0
POINTING_TOLERANCE_FRACTION = POINTING_TOLERANCE / POINTING_REFERENCE_SIDE

Box = tuple[int, int, int, int]  # (x0, y0, x1, y1), exclusive ends, input pixels


@dataclass(frozen=True)
class RegionLayout:
    """Sizes of the standard regions as fractions of the image side (Pellucid's defaults)."""

    corner: float = 0.25
    band: float = 1.0 / 16.0
    centre: float = 0.5

    def __post_init__(self) -> None:
        for name, value, hi in (("corner", self.corner, 0.5), ("band", self.band, 0.5), ("centre", self.centre, 1.0)):
            if not isinstance(value, (int, float)) or not math.isfinite(value) or not 0.0 < value <= hi:
                raise BadParameterError(
                    f"region size {name!r} must be a fraction of the image side in (0, {hi}]; received {value!r}"
                )

    def to_dict(self) -> dict[str, float]:
        return asdict(self)


def box_mask(shape: tuple[int, int], box: Box) -> np.ndarray:
    """(H, W) bool mask of ``box`` clipped to the image."""
    h, w = shape
    x0, y0, x1, y1 = (int(v) for v in box)
    mask = np.zeros((h, w), dtype=bool)
    mask[max(0, y0):max(0, min(h, y1)), max(0, x0):max(0, min(w, x1))] = True
    return mask


def region_masks(shape: tuple[int, int], layout: RegionLayout = RegionLayout()) -> dict[str, np.ndarray]:
    """The standard regions of an (H, W) image as bool masks, keyed by :data:`REGIONS`."""
    h, w = shape
    ch, cw = max(1, round(h * layout.corner)), max(1, round(w * layout.corner))
    band = max(1, round(min(h, w) * layout.band))
    mh, mw = max(1, round(h * layout.centre)), max(1, round(w * layout.centre))
    top, left = (h - mh) // 2, (w - mw) // 2
    border = np.ones((h, w), dtype=bool)
    border[band:h - band, band:w - band] = False
    return {
        "border": border,
        "top_left": box_mask(shape, (0, 0, cw, ch)),
        "top_right": box_mask(shape, (w - cw, 0, w, ch)),
        "bottom_left": box_mask(shape, (0, h - ch, cw, h)),
        "bottom_right": box_mask(shape, (w - cw, h - ch, w, h)),
        "centre": box_mask(shape, (left, top, left + mw, top + mh)),
    }


def region_areas(shape: tuple[int, int], layout: RegionLayout = RegionLayout()) -> dict[str, float]:
    """Each region's share of the image area (what a uniform map would put there)."""
    total = float(shape[0] * shape[1])
    return {name: float(mask.sum()) / total for name, mask in region_masks(shape, layout).items()}


def positive_part(amap: np.ndarray) -> np.ndarray:
    """(H, W) map → its positive part in float64, NaN treated as 0."""
    m = np.nan_to_num(np.asarray(amap, dtype=np.float64), nan=0.0, posinf=0.0, neginf=0.0)
    return np.clip(m, 0.0, None)


def share_inside(amap: np.ndarray, mask: np.ndarray) -> float | None:
    """Share of the map's positive mass inside ``mask``; None when the map has no positive mass."""
    mass = positive_part(amap)
    total = float(mass.sum())
    if total <= 0.0:
        return None
    return float(mass[mask].sum()) / total


def pointing_tolerance(shape: tuple[int, int]) -> float:
    """The pointing game's tolerance in pixels for an (H, W) input: 15/224 of the shorter side."""
    return POINTING_TOLERANCE_FRACTION * float(min(shape[0], shape[1]))


def pointing_hit(amap: np.ndarray, mask: np.ndarray, *, tolerance: float | None = None) -> bool | None:
    """Zhang et al.'s pointing game: does the map's maximum lie within ``tolerance`` px of the object?

    ``tolerance`` None (the default) scales with the map: :func:`pointing_tolerance`. The maximum
    is the first (row-major) pixel holding the largest value. None when the map has no positive
    value (it points nowhere) or the object mask is empty.
    """
    if tolerance is None:
        tolerance = pointing_tolerance(np.shape(amap))
    m = np.nan_to_num(np.asarray(amap, dtype=np.float64), nan=-np.inf)
    if not mask.any() or not np.isfinite(m).any() or float(np.max(m)) <= 0.0:
        return None
    y, x = np.unravel_index(int(np.argmax(m)), m.shape)
    if mask[y, x]:
        return True
    from scipy import ndimage  # here: readers of stored runs (report, runs) need this module, not scipy

    # Euclidean distance from every pixel to the nearest object pixel.
    distance = ndimage.distance_transform_edt(~mask)
    return bool(distance[y, x] <= tolerance)


def energy_pointing(amap: np.ndarray, box: Box) -> float | None:
    """Wang et al.'s energy-based pointing game: share of the map's positive energy inside ``box``."""
    return share_inside(amap, box_mask(amap.shape, box))


def _bounding_box(mask: np.ndarray) -> Box | None:
    ys, xs = np.nonzero(mask)
    if len(xs) == 0:
        return None
    return int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1


@dataclass(frozen=True)
class ImageMeasures:
    """One image's measures (None where undefined: no positive evidence, or no object given)."""

    positive_mass: float
    regions: dict[str, float | None]
    regions_off_object: dict[str, float | None]
    object_share: float | None = None
    pointing_hit: bool | None = None
    energy_pointing: float | None = None

    def to_dict(self) -> dict:
        return {
            "positive_mass": self.positive_mass,
            "regions": dict(self.regions),
            "regions_off_object": dict(self.regions_off_object),
            "object_share": self.object_share,
            "pointing_hit": self.pointing_hit,
            "energy_pointing": self.energy_pointing,
        }


def measure_map(
    amap: np.ndarray,
    *,
    object_mask: np.ndarray | None = None,
    layout: RegionLayout = RegionLayout(),
    tolerance: float | None = None,
) -> ImageMeasures:
    """All measures of one (H, W) attribution map; ``object_mask`` is an (H, W) bool mask or None.

    ``tolerance`` is the pointing game's in pixels; None scales it with the map (15/224 of the
    shorter side).
    """
    amap = np.asarray(amap)
    if amap.ndim != 2:
        raise BadParameterError(f"an attribution map must be (H, W); received shape {amap.shape}")
    mass = float(positive_part(amap).sum())
    masks = region_masks(amap.shape, layout)
    regions = {name: share_inside(amap, mask) for name, mask in masks.items()}
    if object_mask is None or not object_mask.any():
        return ImageMeasures(positive_mass=mass, regions=regions, regions_off_object=dict(regions))
    if object_mask.shape != amap.shape:
        raise BadParameterError(
            f"the object mask is {object_mask.shape} but the map is {amap.shape}; they must match"
        )
    off = {name: share_inside(amap, mask & ~object_mask) for name, mask in masks.items()}
    box = _bounding_box(object_mask)
    assert box is not None
    return ImageMeasures(
        positive_mass=mass,
        regions=regions,
        regions_off_object=off,
        object_share=share_inside(amap, object_mask),
        pointing_hit=pointing_hit(amap, object_mask, tolerance=tolerance),
        energy_pointing=energy_pointing(amap, box),
    )
