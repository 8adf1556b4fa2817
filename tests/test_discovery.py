"""Discovery (spectral relevance analysis), its geometry, the suspicion rule and the channel effect sizes.

Outside references: the eigengap and the zero eigenvalues of a graph with separate components
(von Luxburg, "A tutorial on spectral clustering", Statistics and Computing 2007, Prop. 4 and §8.3),
the self-tuning affinity (Zelnik-Manor & Perona, "Self-Tuning Spectral Clustering", NIPS 2004),
SciPy's graph Laplacian, scikit-learn's adjusted Rand index, and Cohen's d (Cohen, "Statistical
Power Analysis for the Behavioral Sciences", 1988) computed with Python's statistics module.
"""

from __future__ import annotations

import statistics

import numpy as np
import pytest
from scipy.sparse.csgraph import laplacian
from sklearn.metrics import adjusted_rand_score

from pellucid.core.audit.channels import cohens_d, rank_channels
from pellucid.core.audit.discovery import (
    MapEntry,
    Placement,
    _affinity,
    _downsize,
    _laplacian_spectrum,
    cluster_maps,
    discover,
    evidence_region,
    half_mass_area,
    suspicion,
)
from pellucid.core.audit.settings import DiscoverySettings
from pellucid.core.errors import BadParameterError


def _blob(shape: tuple[int, int], centre: tuple[float, float], sigma: float, rng: np.random.Generator) -> np.ndarray:
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(np.float64)
    g = np.exp(-((yy - centre[0]) ** 2 + (xx - centre[1]) ** 2) / (2 * sigma ** 2))
    return g + 0.02 * rng.random(shape)


class TestGeometry:
    def test_half_mass_area_of_an_even_map_is_one_half(self) -> None:
        # common practice, no source: half the mass of an even spread covers half the area
        assert half_mass_area(np.ones((40, 30))) == pytest.approx(0.5)

    def test_evidence_region_matches_an_independent_loop(self) -> None:
        rng = np.random.default_rng(3)
        amap = rng.normal(size=(24, 20))
        region = evidence_region(amap, mass=0.5)
        # reference: walk the positive values from the largest down until half the positive mass is held
        pos = np.clip(amap, 0, None).ravel()
        order = sorted(range(pos.size), key=lambda i: -pos[i])
        held, taken = 0.0, set()
        for i in order:
            if held >= 0.5 * pos.sum() - 1e-12:
                break
            held += pos[i]
            taken.add(i)
        assert set(np.flatnonzero(region.ravel())) == taken

    def test_no_positive_evidence_has_no_region(self) -> None:
        assert not evidence_region(-np.ones((8, 8))).any()
        assert half_mass_area(np.zeros((8, 8))) is None

    def test_downsize_is_an_area_average(self) -> None:
        rng = np.random.default_rng(0)
        unit = rng.random((96, 96))
        unit /= unit.sum()
        # reference: sum of each 6×6 block, computed by reshaping
        assert np.allclose(_downsize(unit, 16), unit.reshape(16, 6, 16, 6).sum(axis=(1, 3)))
        odd = rng.random((32, 30))
        odd /= odd.sum()
        assert _downsize(odd, 16).sum() == pytest.approx(1.0)


class TestSpectral:
    def test_affinity_follows_the_self_tuning_formula(self) -> None:
        rng = np.random.default_rng(1)
        x = rng.random((12, 5))
        a = _affinity(x, 3)
        # Source: Zelnik-Manor & Perona, Self-Tuning Spectral Clustering, NIPS 2004, Eq. 2:
        # A_ij = exp(-d(i, j)^2 / (sigma_i sigma_j)), sigma_i = distance to the K-th neighbour.
        d = np.array([[np.linalg.norm(x[i] - x[j]) for j in range(12)] for i in range(12)])
        sigma = np.array([sorted(d[i])[3] for i in range(12)])
        ref = np.exp(-d ** 2 / np.outer(sigma, sigma))
        np.fill_diagonal(ref, 0.0)
        assert np.allclose(a, ref, atol=1e-12)

    def test_laplacian_spectrum_matches_scipy(self) -> None:
        rng = np.random.default_rng(2)
        a = rng.random((9, 9))
        a = (a + a.T) / 2
        np.fill_diagonal(a, 0.0)
        ref = np.sort(np.linalg.eigvalsh(laplacian(a, normed=True)))
        assert np.allclose(_laplacian_spectrum(a, 9), np.clip(ref, 0, None), atol=1e-10)

    @pytest.mark.parametrize("groups", [1, 2, 3])
    def test_eigengap_counts_separate_groups(self, groups: int) -> None:
        # Source: von Luxburg, A tutorial on spectral clustering, Statistics and Computing 2007, Prop. 4:
        # the eigenvalue 0 of the normalised Laplacian has the multiplicity of the connected components,
        # so groups far apart give that many near-zero eigenvalues, then a gap (§8.3).
        rng = np.random.default_rng(groups)
        places = [(3, 3), (12, 12), (3, 12)][:groups]
        maps, truth = [], []
        for g, centre in enumerate(places):
            for _ in range(12):
                maps.append(_blob((16, 16), centre, 1.5, rng))
                truth.append(g)
        small = np.stack([(m / m.sum()).ravel() for m in maps])
        labels, values, k = cluster_maps(small, max_clusters=6, neighbour=7)
        assert k == groups
        assert adjusted_rand_score(truth, labels) == pytest.approx(1.0)
        assert max(values[:groups]) < 1e-3 < values[groups]

    def test_discover_finds_the_corner_group_and_ranks_it_first(self) -> None:
        rng = np.random.default_rng(7)
        entries = []
        for n in range(24):  # the class's evidence on the subject, in the middle
            entries.append(MapEntry(f"a/{n}.png", "a", _blob((32, 32), (16, 16), 5.0, rng)))
        for n in range(10):  # a group whose evidence sits in the bottom-right corner
            entries.append(MapEntry(f"a/c{n}.png", "a", _blob((32, 32), (29, 29), 1.5, rng)))
        for n in range(8):
            entries.append(MapEntry(f"b/{n}.png", "b", _blob((32, 32), (16, 16), 5.0, rng)))
        d = discover(entries, labels=["a", "b"])
        top = d.ranked()[0]
        assert top.label == "a" and set(top.members) == {f"a/c{n}.png" for n in range(10)}
        assert top.placement.region == "bottom_right" and top.placement.fixed
        assert top.suspicion > 0.5
        assert all(c.suspicion == 0.0 for c in d.ranked()[1:])  # centred evidence, no objects annotated
        assert d.to_dict()["ranking"][0] == top.key

    def test_settings_are_checked(self) -> None:
        with pytest.raises(BadParameterError, match="grid"):
            DiscoverySettings(grid=1).validated()


class TestSuspicion:
    def _placement(self, **kw) -> Placement:
        base = dict(spot_area=0.03, member_spot_area=0.03, spread=0.01, region="bottom_right", region_share=0.7,
                    region_concentration=11.0, off_object=None, with_object=0)
        return Placement(**{**base, **kw})

    def test_on_the_object_scores_nothing(self) -> None:
        score, _ = suspicion(self._placement(off_object=0.3, with_object=10))
        assert score == 0.0

    def test_off_the_object_scores_high_and_says_why(self) -> None:
        score, reasons = suspicion(self._placement(off_object=0.98, with_object=10))
        assert score > 0.9
        assert any("off the annotated objects" in r for r in reasons)

    def test_spread_background_evidence_still_scores_half(self) -> None:
        spread, _ = suspicion(self._placement(spot_area=0.45, member_spot_area=0.45, off_object=1.0, with_object=5))
        assert spread == pytest.approx(0.5 * (1 + 0.1))

    def test_centre_without_objects_scores_nothing(self) -> None:
        assert suspicion(self._placement(region="centre", region_concentration=2.0))[0] == 0.0


class TestChannels:
    def test_cohens_d_against_the_statistics_module(self) -> None:
        rng = np.random.default_rng(4)
        group = rng.normal(2.0, 1.0, size=(9, 3))
        rest = rng.normal(0.0, 1.5, size=(14, 3))
        d = cohens_d(group, rest)
        for c in range(3):
            # Source: Cohen 1988, §2.2 — difference of means over the pooled standard deviation
            g, r = list(group[:, c]), list(rest[:, c])
            pooled = (((len(g) - 1) * statistics.variance(g) + (len(r) - 1) * statistics.variance(r))
                      / (len(g) + len(r) - 2)) ** 0.5
            assert d[c] == pytest.approx((statistics.mean(g) - statistics.mean(r)) / pooled)

    def test_rank_channels_puts_the_channel_that_fires_in_the_group_first(self) -> None:
        rng = np.random.default_rng(5)
        group = rng.normal(0, 1, size=(10, 6))
        rest = rng.normal(0, 1, size=(20, 6))
        group[:, 4] += 5.0
        ranked = rank_channels(group, rest, top=3)
        assert ranked[0]["channel"] == 4 and ranked[0]["effect"] > 3
        assert len(ranked) == 3
