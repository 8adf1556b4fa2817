"""Discovery without a hypothesis: group each class's attribution maps and rank the groups by suspicion.

Spectral relevance analysis (SpRAy), after Lapuschkin et al., "Unmasking Clever Hans predictors and
assessing what machines really learn", Nature Communications 10:1096, 2019: per class, downsize
every image's attribution map, cluster the small maps with spectral clustering, and choose the
number of clusters from the eigengap of the graph Laplacian. A group of images whose evidence sits
somewhere the rest of the class does not look — a corner, the frame, one small spot — is what a
reviewer should see first.

How it is done here (the choices that are ours are marked as such):

- each map's positive part is scaled to sum 1 and area-averaged to a ``grid``×``grid`` picture
  (16×16 by default, our choice; SpRAy downsizes too), so images weigh the same;
- affinity: Zelnik-Manor & Perona, "Self-Tuning Spectral Clustering", NIPS 2004 — a Gaussian of the
  Euclidean distance with a local scale per image (its distance to its 7th nearest neighbour);
- cluster count: the largest gap between consecutive eigenvalues of the normalised Laplacian
  (von Luxburg, "A tutorial on spectral clustering", Statistics and Computing 17(4), 2007, §8.3),
  from 1 to ``max_clusters``; clusters from scikit-learn's ``SpectralClustering`` on that affinity
  (``assign_labels="cluster_qr"``, which involves no random start);
- per cluster: its size, its members (the most typical first: nearest to the cluster's mean small
  map), its mean map, where its evidence sits (see :class:`Placement`) and a suspicion score
  (see :func:`suspicion`).

A cluster is evidence about this model on these images, not proof of a shortcut: a real cue can
be small and off-centre too. Confirmation (:mod:`pellucid.core.audit.confirm`) tests the model's
response; the reviewer's domain rules decide.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from pellucid.core.audit.aggregate import REGION_WORDS
from pellucid.core.audit.measures import REGIONS, positive_part, region_masks
from pellucid.core.audit.settings import DiscoverySettings

__all__ = [
    "ClassDiscovery",
    "Cluster",
    "Discovery",
    "DiscoverySettings",
    "MapEntry",
    "Placement",
    "cluster_maps",
    "discover",
    "discover_class",
    "evidence_region",
    "half_mass_area",
    "suspicion",
]


@dataclass(frozen=True)
class MapEntry:
    """One image's map: ``amap`` is (H, W) at input resolution; ``object_mask`` (H, W) bool or None."""

    rel: str
    label: str
    amap: np.ndarray = field(repr=False)
    object_mask: np.ndarray | None = field(default=None, repr=False)


# ------------------------------------------------------------------------------------ map geometry


def _unit_mass(amap: np.ndarray) -> np.ndarray | None:
    """The positive part scaled to sum 1 (float64), or None when there is no positive evidence."""
    mass = positive_part(amap)
    total = float(mass.sum())
    if not math.isfinite(total) or total <= 0.0:
        return None
    return mass / total


def evidence_region(amap: np.ndarray, *, mass: float = 0.5) -> np.ndarray:
    """(H, W) bool: the fewest pixels that hold ``mass`` of the map's positive evidence.

    Pixels are taken from the largest value down (ties in row-major order, so the result is
    deterministic). An empty mask when the map has no positive evidence.
    """
    unit = _unit_mass(amap)
    out = np.zeros(np.shape(amap), dtype=bool)
    if unit is None:
        return out
    flat = unit.ravel()
    order = np.argsort(-flat, kind="stable")
    cum = np.cumsum(flat[order])
    n = int(np.searchsorted(cum, mass - 1e-12)) + 1
    out.ravel()[order[:min(n, flat.size)]] = True
    return out


def half_mass_area(amap: np.ndarray) -> float | None:
    """Share of the image area that holds half of the positive evidence (0.5 for an even map)."""
    if _unit_mass(amap) is None:
        return None
    return float(evidence_region(amap, mass=0.5).mean())


def _downsize(unit: np.ndarray, grid: int) -> np.ndarray:
    """(H, W) → (grid, grid) by area averaging (each output cell averages the pixels it covers)."""
    h, w = unit.shape
    ys = np.linspace(0, h, grid + 1)
    xs = np.linspace(0, w, grid + 1)
    # integral image: exact area averages for any cell bounds, including fractional ones
    ii = np.zeros((h + 1, w + 1))
    ii[1:, 1:] = unit.cumsum(0).cumsum(1)

    def at(y: np.ndarray, x: np.ndarray) -> np.ndarray:
        # The integral image is bilinear inside each pixel, so this is exact for fractional bounds.
        y0, x0 = np.minimum(np.floor(y).astype(int), h), np.minimum(np.floor(x).astype(int), w)
        y1, x1 = np.minimum(y0 + 1, h), np.minimum(x0 + 1, w)
        fy, fx = (y - y0)[:, None], (x - x0)[None, :]
        return ((1 - fy) * (1 - fx) * ii[y0][:, x0] + (1 - fy) * fx * ii[y0][:, x1]
                + fy * (1 - fx) * ii[y1][:, x0] + fy * fx * ii[y1][:, x1])

    corner = at(ys, xs)  # (grid+1, grid+1)
    cells = corner[1:, 1:] - corner[:-1, 1:] - corner[1:, :-1] + corner[:-1, :-1]
    return cells / max(cells.sum(), 1e-300)


# ------------------------------------------------------------------------------------- clustering


def _affinity(x: np.ndarray, neighbour: int) -> np.ndarray:
    """Self-tuning Gaussian affinity (Zelnik-Manor & Perona 2004) of the rows of ``x`` (n, d)."""
    sq = np.einsum("ij,ij->i", x, x)
    d2 = np.maximum(sq[:, None] + sq[None, :] - 2.0 * x @ x.T, 0.0)
    np.fill_diagonal(d2, 0.0)
    d = np.sqrt(d2)
    k = min(neighbour, len(x) - 1)
    sigma = np.sort(d, axis=1)[:, k]
    floor = max(float(np.median(sigma)) * 1e-3, 1e-12)  # identical maps: no zero scale
    sigma = np.maximum(sigma, floor)
    a = np.exp(-d2 / (sigma[:, None] * sigma[None, :]))
    np.fill_diagonal(a, 0.0)
    return a


def _laplacian_spectrum(a: np.ndarray, count: int) -> np.ndarray:
    """The ``count`` smallest eigenvalues of the normalised Laplacian I − D^-1/2 A D^-1/2."""
    deg = a.sum(axis=1)
    inv = 1.0 / np.sqrt(np.maximum(deg, 1e-300))
    lap = np.eye(len(a)) - inv[:, None] * a * inv[None, :]
    values = np.linalg.eigvalsh((lap + lap.T) / 2.0)
    return np.clip(values[:count], 0.0, None)


def cluster_maps(small: np.ndarray, *, max_clusters: int, neighbour: int) -> tuple[np.ndarray, list[float], int]:
    """Spectral clustering of (n, d) downsized maps; returns (labels (n,), eigenvalues, cluster count).

    The count is the eigengap's choice (largest λ_{k+1} − λ_k for k = 1 … max_clusters).
    """
    n = len(small)
    a = _affinity(small, neighbour)
    top = min(max_clusters, n - 1)
    values = _laplacian_spectrum(a, top + 1)
    gaps = np.diff(values)
    k = int(np.argmax(gaps[:top])) + 1 if top >= 1 else 1
    if k == 1:
        return np.zeros(n, dtype=np.int64), [float(v) for v in values], 1
    from sklearn.cluster import SpectralClustering

    with warnings.catch_warnings():
        # A nearly disconnected graph (a tight group far from the rest) is exactly what we look for;
        # scikit-learn warns about it, and its embedding is still right.
        warnings.simplefilter("ignore", UserWarning)
        labels = SpectralClustering(n_clusters=k, affinity="precomputed", assign_labels="cluster_qr",
                                    random_state=0).fit_predict(a)
    # Stable numbering: the largest cluster first, ties by its first member.
    order = sorted(set(labels.tolist()), key=lambda c: (-int((labels == c).sum()), int(np.argmax(labels == c))))
    remap = {c: i for i, c in enumerate(order)}
    return np.array([remap[c] for c in labels], dtype=np.int64), [float(v) for v in values], len(order)


# -------------------------------------------------------------------------------------- placement



@dataclass(frozen=True)
class Placement:
    """Where a cluster's evidence sits.

    ``spot_area``: share of the image that holds half of the cluster's mean evidence (0.5 for an even
    spread); ``member_spot_area``: the same for each member's own map, median over members (small
    even when the spot moves from image to image). ``spread``: how far the members' peaks lie from
    their mean position, as a share of the image diagonal. ``region``: the standard region with the
    highest concentration (its share of the mean evidence over its share of the area).
    ``off_object``: mean share of the members' evidence off their object, None without boxes or masks.
    """

    spot_area: float
    member_spot_area: float
    spread: float
    region: str
    region_share: float
    region_concentration: float
    off_object: float | None
    with_object: int

    @property
    def fixed(self) -> bool:
        """Does the spot stay in one place? (its mean map is about as compact as its members' maps)"""
        return self.spot_area <= 2.0 * self.member_spot_area

    def to_dict(self) -> dict:
        return {"spot_area": self.spot_area, "member_spot_area": self.member_spot_area, "spread": self.spread,
                "region": self.region, "region_share": self.region_share,
                "region_concentration": self.region_concentration, "off_object": self.off_object,
                "with_object": self.with_object, "fixed": self.fixed}


@dataclass(frozen=True)
class _Member:
    """What placement needs of one map, computed once so the full map need not be kept."""

    spot: float  # half-mass area share of its own map
    peak: tuple[int, int]
    off_object: float | None


def _member(unit: np.ndarray, mask: np.ndarray | None) -> _Member:
    peak = np.unravel_index(int(np.argmax(unit)), unit.shape)
    return _Member(spot=half_mass_area(unit) or 0.5, peak=(int(peak[0]), int(peak[1])),
                   off_object=float(unit[~mask].sum()) if mask is not None and mask.shape == unit.shape else None)


def _placement(members: list[_Member], mean: np.ndarray, regions: dict[str, np.ndarray]) -> Placement:
    """Placement of a cluster from its members' facts and their mean unit-mass map."""
    h, w = mean.shape
    spot = half_mass_area(mean) or 0.5
    member = float(np.median([m.spot for m in members]))
    peaks = np.array([m.peak for m in members], dtype=np.float64)
    spread = float(np.sqrt(((peaks - peaks.mean(0)) ** 2).sum(1).mean()) / math.hypot(h, w))
    total = float(mean.sum())
    best, best_share, best_conc = "centre", 0.0, 0.0
    for name in REGIONS:
        mask = regions[name]
        share = float(mean[mask].sum()) / total if total > 0 else 0.0
        conc = share / max(float(mask.mean()), 1e-12)
        if conc > best_conc:
            best, best_share, best_conc = name, share, conc
    off = [m.off_object for m in members if m.off_object is not None]
    return Placement(spot_area=spot, member_spot_area=member, spread=spread, region=best, region_share=best_share,
                     region_concentration=best_conc, off_object=float(np.mean(off)) if off else None,
                     with_object=len(off))


# ------------------------------------------------------------------------------------- suspicion

OFF_CENTRE_REGIONS = ("border", "top_left", "top_right", "bottom_left", "bottom_right")


def suspicion(placement: Placement) -> tuple[float, list[str]]:
    """A score in [0, 1] and the reasons behind it; higher means "look at this cluster first".

    Our own score: ``apart × (1 + compact) / 2``. Being set apart from the subject is necessary; a
    compact spot raises the score, but evidence spread over the background (a tint, a texture)
    still scores half.

    - **compact**: the evidence sits in a small spot, ``1 − 2·a`` for the spot's area share ``a``
      (the members' own spots when the spot moves, the mean spot when it stays): 0 for evidence
      spread evenly, near 1 for a point;
    - **set apart**: the spot is not the object. With boxes or masks: ``2·o − 1`` for the share ``o``
      of the evidence off the object (0 when at most half of it is off, 1 when all is). Without
      them, a spot that stays in the border band or a corner box scores ``1 − 1/c`` for that
      region's concentration ``c`` (share of the evidence over share of the area); a spot in the
      centre, where the subject usually is, scores 0; a spot that moves scores 0.5, since without
      an annotated object no place can be told apart.
    """
    p = placement
    area = p.spot_area if p.fixed else p.member_spot_area
    compact = min(1.0, max(0.0, 1.0 - 2.0 * area))
    reasons = [f"half of its evidence covers {100 * area:.1f}% of the image"
               + ("" if p.fixed else " (a spot that moves from image to image)")]
    if p.off_object is not None:
        apart = min(1.0, max(0.0, 2.0 * p.off_object - 1.0))
        reasons.append(f"{100 * p.off_object:.0f}% of its evidence lies off the annotated objects")
    elif p.fixed and p.region in OFF_CENTRE_REGIONS:
        apart = max(0.0, 1.0 - 1.0 / max(p.region_concentration, 1e-12))
        reasons.append(f"it gathers in {REGION_WORDS[p.region]} ({100 * p.region_share:.0f}% of the evidence, "
                       f"{p.region_concentration:.1f}× that region's share of the area); no boxes or masks were given")
    elif p.fixed:
        apart = 0.0
        reasons.append("it gathers in the centre, where the subject usually is; no boxes or masks were given")
    else:
        apart = 0.5
        reasons.append("no boxes or masks were given, so its place cannot be told apart from the subject")
    return float(apart * (1.0 + compact) / 2.0), reasons


# ---------------------------------------------------------------------------------------- results


@dataclass
class Cluster:
    label: str
    index: int
    size: int
    share: float  # of the class's clustered images
    members: list[str]  # rel paths, the most typical first
    placement: Placement
    suspicion: float
    reasons: list[str]
    mean_map: np.ndarray = field(repr=False)  # (H, W), scaled so 1 = an even spread
    channels: dict | None = None

    @property
    def key(self) -> str:
        return f"{self.label}/{self.index}"

    def to_dict(self, *, members: int = 24) -> dict:
        return {"class": self.label, "index": self.index, "key": self.key, "size": self.size, "share": self.share,
                "members": self.members[:members], "members_total": len(self.members),
                "placement": self.placement.to_dict(), "suspicion": self.suspicion, "reasons": list(self.reasons),
                "channels": self.channels}


@dataclass
class ClassDiscovery:
    label: str
    images: int  # maps of the class
    clustered: int  # maps clustered: those with positive evidence (an even sample beyond ``max_images``)
    no_evidence: int  # maps without any positive evidence
    eigenvalues: list[float]
    clusters: list[Cluster]
    spot_area: float | None
    note: str | None = None

    def to_dict(self) -> dict:
        return {"class": self.label, "images": self.images, "clustered": self.clustered,
                "no_evidence": self.no_evidence, "eigenvalues": self.eigenvalues, "count": len(self.clusters),
                "spot_area": self.spot_area, "note": self.note, "clusters": [c.to_dict() for c in self.clusters]}


@dataclass
class Discovery:
    settings: DiscoverySettings
    classes: list[ClassDiscovery]

    def ranked(self) -> list[Cluster]:
        """Every cluster of every class, most suspicious first (ties: larger first, then by key)."""
        return sorted((c for cd in self.classes for c in cd.clusters),
                      key=lambda c: (-c.suspicion, -c.size, c.label, c.index))

    def to_dict(self) -> dict:
        return {"method": "spectral relevance analysis (Lapuschkin et al., Nature Communications 2019)",
                "settings": self.settings.to_dict(), "classes": [c.to_dict() for c in self.classes],
                "ranking": [c.key for c in self.ranked()]}


def _even_sample(n: int, limit: int) -> list[int]:
    if n <= limit:
        return list(range(n))
    return sorted({int(v) for v in np.rint(np.linspace(0, n - 1, limit))})


def discover_class(entries: Sequence[MapEntry], *, label: str,
                   settings: DiscoverySettings | None = None) -> ClassDiscovery:
    """Cluster the maps of one class (``entries`` all explain ``label``); see the module docstring.

    Memory: beyond the entries' own maps, only the small maps and a few numbers per image are
    kept; cluster means are summed in a second pass over the entries.
    """
    s = (settings or DiscoverySettings()).validated()
    kept = [e for e in entries if _unit_mass(e.amap) is not None]
    if not kept:
        return ClassDiscovery(label, len(entries), 0, len(entries), [], [], None,
                              note="no image of this class has positive evidence")
    n_evidence = len(kept)
    kept = [kept[i] for i in _even_sample(n_evidence, s.max_images)]
    shape = np.shape(kept[0].amap)
    regions = region_masks(shape)
    small_rows: list[np.ndarray] = []
    facts: list[_Member] = []
    for e in kept:
        u = _unit_mass(e.amap)
        assert u is not None
        small_rows.append(_downsize(u, s.grid).ravel())
        facts.append(_member(u, e.object_mask))
    small = np.stack(small_rows)
    note = None
    if len(kept) < s.min_images:
        assign, values, k = np.zeros(len(kept), dtype=np.int64), [], 1
        note = f"only {len(kept)} image(s) with evidence: shown as one group, not clustered"
    else:
        assign, values, k = cluster_maps(small, max_clusters=s.max_clusters, neighbour=s.neighbour)
        if len(kept) < n_evidence:
            note = f"an even sample of {len(kept)} of the class's {n_evidence} maps was clustered"
    sums = np.zeros((k, *shape))
    for i, e in enumerate(kept):
        sums[assign[i]] += _unit_mass(e.amap)
    clusters: list[Cluster] = []
    for c in range(k):
        idx = [i for i in range(len(kept)) if assign[i] == c]
        centre = small[idx].mean(axis=0)
        order = sorted(idx, key=lambda i: (float(((small[i] - centre) ** 2).sum()), i))
        mean = sums[c] / len(idx)
        place = _placement([facts[i] for i in idx], mean, regions)
        score, reasons = suspicion(place)
        clusters.append(Cluster(label=label, index=c, size=len(idx), share=len(idx) / len(kept),
                                members=[kept[i].rel for i in order], placement=place, suspicion=score,
                                reasons=reasons, mean_map=(mean * mean.size).astype(np.float32)))
    return ClassDiscovery(label=label, images=len(entries), clustered=len(kept), no_evidence=len(entries) - n_evidence,
                          eigenvalues=values[:8], clusters=clusters,
                          spot_area=half_mass_area(sums.sum(axis=0) / len(kept)), note=note)


def discover(entries: Sequence[MapEntry], *, labels: Sequence[str],
             settings: DiscoverySettings | None = None) -> Discovery:
    """:func:`discover_class` for every class in ``labels`` that has entries."""
    s = (settings or DiscoverySettings()).validated()
    out = [discover_class([e for e in entries if e.label == label], label=label, settings=s)
           for label in labels if any(e.label == label for e in entries)]
    return Discovery(settings=s, classes=out)
