"""Shortcut measures on synthetic maps whose answers are known by construction."""

from __future__ import annotations

import numpy as np
import pytest

from pellucid.core.audit.measures import (
    POINTING_TOLERANCE,
    RegionLayout,
    box_mask,
    energy_pointing,
    measure_map,
    pointing_hit,
    pointing_tolerance,
    region_areas,
    region_masks,
    share_inside,
)
from pellucid.core.errors import BadParameterError


class TestPointingGame:
    # Source: Zhang et al., "Top-down Neural Attention by Excitation Backprop", ECCV 2016 (IJCV 2018),
    # pointing game: a hit when the map's maximum falls on the object, with a 15-pixel tolerance
    # on inputs of about 224 px. Pellucid keeps that share of the input's shorter side.
    def test_tolerance_is_fifteen_pixels_at_224(self) -> None:
        assert POINTING_TOLERANCE == 15.0
        assert pointing_tolerance((224, 224)) == pytest.approx(15.0)
        assert pointing_tolerance((224, 320)) == pytest.approx(15.0)  # the shorter side decides
        assert pointing_tolerance((32, 32)) == pytest.approx(15.0 * 32 / 224)

    def test_peak_inside_is_a_hit(self) -> None:
        amap = np.zeros((100, 100))
        amap[40, 40] = 1.0
        assert pointing_hit(amap, box_mask((100, 100), (30, 30, 50, 50))) is True

    @pytest.mark.parametrize("offset, expected", [(10, True), (15, True), (16, False), (30, False)])
    def test_peak_outside_counts_within_tolerance(self, offset: int, expected: bool) -> None:
        # A 224×224 input: the paper's 15 px. Object spans x in [30, 50); the peak sits `offset` px
        # right of its last column (x = 49).
        amap = np.zeros((224, 224))
        amap[40, 49 + offset] = 1.0
        assert pointing_hit(amap, box_mask((224, 224), (30, 30, 50, 50))) is expected

    def test_diagonal_distance_is_euclidean(self) -> None:
        # 11 px right and 11 px down of the corner pixel (49, 49): distance 15.56 > 15 → miss.
        amap = np.zeros((100, 100))
        amap[60, 60] = 1.0
        assert pointing_hit(amap, box_mask((100, 100), (30, 30, 50, 50)), tolerance=15.0) is False
        amap[:] = 0
        amap[59, 59] = 1.0  # 10·√2 = 14.1 → hit
        assert pointing_hit(amap, box_mask((100, 100), (30, 30, 50, 50)), tolerance=15.0) is True

    def test_small_input_no_longer_scores_every_peak_a_hit(self) -> None:
        # A 32×32 input with the object in the top-left 8×8 box and the peak at (14, 14): √(7² + 7²)
        # = 9.9 px from the box's corner pixel (7, 7). A fixed 15 px would call it a hit (it is
        # nearly half the image away); 15/224 of 32 px = 2.1 px does not.
        amap = np.zeros((32, 32))
        amap[14, 14] = 1.0
        box = box_mask((32, 32), (0, 0, 8, 8))
        distance = float(np.hypot(14 - 7, 14 - 7))
        assert distance > 15.0 * 32 / 224
        assert pointing_hit(amap, box, tolerance=15.0) is True  # the old, unscaled rule
        assert pointing_hit(amap, box) is False
        amap[:] = 0
        amap[9, 8] = 1.0  # √(2² + 1²) = 2.24 > 2.14 → miss; (8, 8) at √2 → hit
        assert pointing_hit(amap, box) is False
        amap[:] = 0
        amap[8, 8] = 1.0
        assert pointing_hit(amap, box) is True
        # The per-image measures and so the class's pointing accuracy follow the same rule.
        far = np.zeros((32, 32))
        far[14, 14] = 1.0
        assert measure_map(far, object_mask=box).pointing_hit is False
        assert measure_map(far, object_mask=box, tolerance=15.0).pointing_hit is True

    def test_no_positive_evidence_is_undecided(self) -> None:
        assert pointing_hit(np.zeros((20, 20)), box_mask((20, 20), (0, 0, 5, 5))) is None
        assert pointing_hit(-np.ones((20, 20)), box_mask((20, 20), (0, 0, 5, 5))) is None


class TestEnergyPointing:
    # Source: Wang et al., "Score-CAM: Score-Weighted Visual Explanations for CNNs", CVPR Workshops 2020,
    # §4.3: the share of the saliency map's energy that falls inside the object's bounding box.
    def test_uniform_map_gives_the_area_fraction(self) -> None:
        assert energy_pointing(np.ones((100, 100)), (0, 0, 50, 50)) == pytest.approx(0.25)

    def test_map_only_inside_gives_one(self) -> None:
        amap = box_mask((64, 64), (10, 10, 30, 20)).astype(float) * 3.0
        assert energy_pointing(amap, (10, 10, 30, 20)) == pytest.approx(1.0)

    def test_half_the_mass_inside(self) -> None:
        amap = np.zeros((10, 10))
        amap[0, 0] = 2.0
        amap[9, 9] = 2.0
        assert energy_pointing(amap, (0, 0, 5, 5)) == pytest.approx(0.5)

    def test_negative_values_are_not_evidence(self) -> None:  # derived from the definition (positive part)
        amap = np.zeros((10, 10))
        amap[0, 0] = 1.0
        amap[9, 9] = -5.0
        assert energy_pointing(amap, (0, 0, 5, 5)) == pytest.approx(1.0)

    def test_zero_map_is_undefined(self) -> None:
        assert energy_pointing(np.zeros((8, 8)), (0, 0, 4, 4)) is None


class TestRegions:
    def test_default_areas_on_a_96_pixel_tile(self) -> None:  # derived: 24-px corners, 6-px band, 48-px centre
        areas = region_areas((96, 96))
        assert areas["bottom_right"] == pytest.approx(24 * 24 / 96**2)
        assert areas["centre"] == pytest.approx(48 * 48 / 96**2)
        assert areas["border"] == pytest.approx(1 - 84 * 84 / 96**2)

    @pytest.mark.parametrize("side", [32, 96, 224])
    def test_regions_scale_with_the_input(self, side: int) -> None:
        # The rule (module docstring): corner box = 1/4 of each side, band = 1/16 of the shorter
        # side, centre = 1/2 of each side; counted here pixel by pixel.
        m = region_masks((side, side))
        corner, band = side // 4, side // 16
        assert m["top_left"].sum() == corner * corner
        assert m["top_left"][corner - 1, corner - 1] and not m["top_left"][corner, corner]
        inner = sum(1 for y in range(side) for x in range(side)
                    if band <= y < side - band and band <= x < side - band)
        assert m["border"].sum() == side * side - inner
        assert m["centre"].sum() == (side // 2) ** 2
        # so a uniform map gives the same shares at every size
        assert region_areas((side, side))["bottom_right"] == pytest.approx(1 / 16)

    def test_corner_boxes_are_where_they_say(self) -> None:
        m = region_masks((96, 96))
        assert m["bottom_right"][95, 95] and not m["bottom_right"][0, 0]
        assert m["top_left"][0, 0] and not m["top_left"][95, 95]
        assert m["top_right"][0, 95] and m["bottom_left"][95, 0]

    def test_uniform_map_shares_equal_areas(self) -> None:
        res = measure_map(np.ones((96, 96)))
        for name, area in region_areas((96, 96)).items():
            assert res.regions[name] == pytest.approx(area)

    def test_tag_in_corner_off_the_object(self) -> None:
        amap = np.zeros((96, 96))
        amap[80:90, 80:90] = 1.0  # all evidence on a corner tag
        amap[40:50, 40:50] = 1.0  # and as much on the object
        obj = box_mask((96, 96), (40, 40, 50, 50))
        res = measure_map(amap, object_mask=obj)
        assert res.object_share == pytest.approx(0.5)
        assert res.regions["bottom_right"] == pytest.approx(0.5)
        assert res.regions_off_object["bottom_right"] == pytest.approx(0.5)
        assert res.regions_off_object["centre"] == pytest.approx(0.0)  # centre evidence is on the object
        assert res.pointing_hit is True  # first maximum (row-major) is the object's top-left pixel

    def test_bad_layout_and_shapes(self) -> None:
        with pytest.raises(BadParameterError, match="corner"):
            RegionLayout(corner=0.9)
        with pytest.raises(BadParameterError, match=r"\(H, W\)"):
            measure_map(np.zeros((2, 3, 4)))
        with pytest.raises(BadParameterError, match="must match"):
            measure_map(np.ones((8, 8)), object_mask=np.ones((4, 4), dtype=bool))

    def test_share_inside_zero_map(self) -> None:
        assert share_inside(np.zeros((4, 4)), np.ones((4, 4), dtype=bool)) is None
