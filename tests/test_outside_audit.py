"""A whole audit recounted by hand on a small constructed folder: per-class aggregation, then injection.

The folder holds the demo model's sample tiles, one resized copy that is not square, one copy that
already carries the suspect patch where it will be pasted, and object boxes for a few images.
Everything the audit reports is recomputed here without Pellucid's code: the pictures with
torchvision's transforms (checked pixel for pixel against Pellucid in test_outside_preprocess.py),
the maps with torch.autograd, the regions with numpy slicing of the documented layout, the
pointing game by brute-force distances, and every count and mean with plain loops.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision.transforms as T
from PIL import Image

from pellucid.core.audit import AuditSettings, InjectionSpec, injection_test, load_dataset, run_audit
from pellucid.core.audit.store import Store
from pellucid.core.model.loading import load_model

REPO = Path(__file__).resolve().parents[1]
SAMPLES = REPO / "demo_models" / "tilenet" / "samples"
SUSPECT = "crack"
TAG_AT = (77, 77)  # top-left (x, y) of the tag in sound_tagged_03.png, in model-input pixels
TAG_SIZE = 12
# Flag thresholds lower than the defaults, so that on this small folder some classes, regions and
# images are flagged and others are not (the rule is the same whatever the thresholds).
FLAG_CONCENTRATION = 1.7
FLAG_OUTSIDE = 0.7
SETTINGS = dict(method="saliency", shard_size=4, flag_concentration=FLAG_CONCENTRATION, flag_outside=FLAG_OUTSIDE)
# Boxes (x0, y0, x1, y1) in stored-image pixels, for the images that have one. Chosen so that the
# pointing game has a hit inside the box, a hit only within the tolerance, and a miss.
BOXES = {
    "crack/crack_tagged_01.png": (70, 70, 96, 96),
    "chip/chip_plain_01.png": (0, 60, 40, 96),
    "sound/sound_plain_01.png": (30, 30, 73, 66),
    "bubble/bubble_tagged_01.png": (60, 60, 96, 96),
}


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.fixture(scope="module")
def tilenet():
    spec = REPO / "demo_models" / "tilenet" / "spec.toml"
    if not spec.is_file() or not (SAMPLES / "sound_tagged_03.png").is_file():
        pytest.skip("demo_models/tilenet and its samples are not built")
    return load_model(spec)


def _rgb(path: Path) -> np.ndarray:
    with Image.open(path) as img:
        return np.asarray(img.convert("RGB"), dtype=np.uint8)


def _size(path: Path) -> tuple[int, int]:
    with Image.open(path) as img:
        return img.size


@pytest.fixture(scope="module")
def folder(tmp_path_factory, tilenet) -> Path:
    root = tmp_path_factory.mktemp("constructed")
    rows = []

    def add(label: str, name: str, picture: np.ndarray) -> None:
        (root / label).mkdir(exist_ok=True)
        Image.fromarray(picture).save(root / label / name)
        rel = f"{label}/{name}"
        rows.append([rel, label, *(BOXES.get(rel) or ("", "", "", ""))])

    for name in ("sound_tagged_01", "sound_tagged_03", "sound_plain_01", "crack_tagged_01", "crack_plain_01",
                 "chip_tagged_01", "chip_plain_01", "bubble_tagged_01", "bubble_plain_01"):
        add(name.split("_")[0], f"{name}.png", _rgb(SAMPLES / f"{name}.png"))
    # Not square: the spec's resize (shorter side 96) and centre crop act on it.
    wide = Image.fromarray(_rgb(SAMPLES / "bubble_plain_01.png")).resize((131, 110), Image.Resampling.BICUBIC)
    add("bubble", "bubble_wide.png", np.asarray(wide))
    # Carries the suspect patch exactly where it will be pasted: the injection must skip it.
    patch = _tag_patch()
    carrier = _rgb(SAMPLES / "chip_plain_01.png").copy()
    carrier[TAG_AT[1]:TAG_AT[1] + TAG_SIZE, TAG_AT[0]:TAG_AT[0] + TAG_SIZE] = patch
    add("chip", "chip_carrier.png", carrier)
    with open(root / "manifest.csv", "w", newline="") as f:
        writer = csv.writer(f)
        writer.writerow(["path", "label", "box_x0", "box_y0", "box_x1", "box_y1"])
        writer.writerows(rows)
    return root


def _tag_patch() -> np.ndarray:
    x, y = TAG_AT
    return _rgb(SAMPLES / "sound_tagged_03.png")[y:y + TAG_SIZE, x:x + TAG_SIZE].copy()


# ---------------------------------------------------------------------------------------------
# The reference, written out


def picture_by_hand(model, path: Path) -> np.ndarray:
    # Source: torchvision 0.29, transforms.Resize(shorter side) and CenterCrop on a Pillow image.
    pre = model.spec.preprocess
    img = Image.fromarray(_rgb(path))
    img = T.CenterCrop(tuple(pre.crop))(T.Resize(pre.resize[0])(img))
    return np.asarray(img, dtype=np.uint8)


def tensor_by_hand(model, picture: np.ndarray) -> torch.Tensor:
    # Source: torchvision 0.29, transforms.ToTensor and Normalize.
    pre = model.spec.preprocess
    return T.Normalize(pre.mean, pre.std)(T.ToTensor()(Image.fromarray(picture))).unsqueeze(0)


def probabilities_by_hand(model, x: torch.Tensor) -> np.ndarray:
    with torch.no_grad():
        return torch.softmax(model.module(x).double(), dim=1)[0].numpy()


def saliency_by_hand(model, x: torch.Tensor, target: int) -> np.ndarray:
    # Source: Simonyan, Vedaldi, Zisserman, arXiv:1312.6034 (2013), §3.1: max over channels of |∂S_c/∂x|.
    z = x.detach().clone().requires_grad_(True)
    (grad,) = torch.autograd.grad(model.module(z)[0, target], z)
    return grad[0].abs().amax(dim=0).numpy().astype(np.float64)


def regions_by_hand(h: int, w: int) -> dict[str, np.ndarray]:
    # The layout documented in core/audit/measures.py: corner boxes of 1/4 of each side, a border
    # band of 1/16 of the shorter side, a centre box of 1/2 of each side; written with slices here.
    ch, cw, band = round(h / 4), round(w / 4), round(min(h, w) / 16)
    mh, mw = round(h / 2), round(w / 2)
    out = {name: np.zeros((h, w), dtype=bool) for name in
           ("border", "top_left", "top_right", "bottom_left", "bottom_right", "centre")}
    out["border"][:band, :] = out["border"][h - band:, :] = True
    out["border"][:, :band] = out["border"][:, w - band:] = True
    out["top_left"][:ch, :cw] = True
    out["top_right"][:ch, w - cw:] = True
    out["bottom_left"][h - ch:, :cw] = True
    out["bottom_right"][h - ch:, w - cw:] = True
    top, left = (h - mh) // 2, (w - mw) // 2
    out["centre"][top:top + mh, left:left + mw] = True
    return out


def share(positive: np.ndarray, mask: np.ndarray) -> float | None:
    total = positive.sum()
    return None if total <= 0 else float(positive[mask].sum() / total)


def pointing_by_hand(amap: np.ndarray, mask: np.ndarray, tolerance: float) -> bool | None:
    # Source: Zhang et al., "Top-down Neural Attention by Excitation Backprop", ECCV 2016, §5.1: a hit
    # when the maximum lies on the object or within the tolerance of it (15 px at 224 px inputs,
    # scaled to the input as core/audit/measures.py documents). Distances by brute force here.
    if amap.max() <= 0:
        return None
    y, x = divmod(int(np.argmax(amap)), amap.shape[1])
    ys, xs = np.nonzero(mask)
    return bool(np.sqrt(((ys - y) ** 2 + (xs - x) ** 2).min()) <= tolerance)


def _mean(values):
    return sum(values) / len(values) if values else None


def _approx(value, rel: float = 1e-5):
    return None if value is None else pytest.approx(value, rel=rel, abs=1e-9)


# ---------------------------------------------------------------------------------------------
# Per-class aggregation


@pytest.fixture(scope="module")
def audited(tmp_path_factory, tilenet, folder):
    store = Store(tmp_path_factory.mktemp("store"))
    dataset = load_dataset(folder)
    outcome = run_audit(tilenet, dataset, store=store, settings=AuditSettings(**SETTINGS))
    yield dataset, outcome, store
    store.close()


@pytest.fixture(scope="module")
def by_hand(tilenet, folder):
    """Every image recomputed here: label, prediction, map, object mask."""
    labels = tilenet.labels
    out = {}
    with open(folder / "manifest.csv", newline="") as f:
        for row in csv.DictReader(f):
            picture = picture_by_hand(tilenet, folder / row["path"])
            x = tensor_by_hand(tilenet, picture)
            probs = probabilities_by_hand(tilenet, x)
            label = labels.index(row["label"])
            mask = None
            if row["box_x0"]:
                x0, y0, x1, y1 = (int(row[k]) for k in ("box_x0", "box_y0", "box_x1", "box_y1"))
                assert _size(folder / row["path"]) == (96, 96)  # boxes only where no resize happens
                mask = np.zeros((96, 96), dtype=bool)
                mask[y0:y1, x0:x1] = True
            out[row["path"]] = {"label": row["label"], "label_index": label, "predicted": int(np.argmax(probs)),
                                "map": saliency_by_hand(tilenet, x, label), "mask": mask}
    return out


def test_maps_are_the_saliency_written_here(audited, by_hand):
    _, outcome, store = audited
    rows = {r.rel: r for r in store.results(outcome.run.id)}
    assert set(rows) == set(by_hand)
    for rel, mine in by_hand.items():
        stored = store.get_array(rows[rel].map_hash)
        assert np.abs(stored - mine["map"]).max() <= 1e-5 * mine["map"].max(), rel
        assert rows[rel].data["predicted"] == mine["predicted"], rel


def test_accuracy_and_confusion_are_counted_exactly(audited, by_hand, tilenet):
    _, outcome, _ = audited
    s = outcome.summary
    k = len(tilenet.labels)
    confusion = [[0] * k for _ in range(k)]
    for mine in by_hand.values():
        confusion[mine["label_index"]][mine["predicted"]] += 1
    assert s["confusion"]["matrix"] == confusion
    correct = sum(1 for m in by_hand.values() if m["predicted"] == m["label_index"])
    assert s["images"] == s["done"] == len(by_hand) == 11
    assert s["accuracy"] == correct / len(by_hand)
    assert 0 < correct < len(by_hand), "the folder must hold right and wrong answers for the check to bite"
    for c, entry in s["per_class"].items():
        mine = [m for m in by_hand.values() if m["label"] == c]
        assert entry["images"] == len(mine)
        assert entry["correct"] == sum(1 for m in mine if m["predicted"] == m["label_index"])
        assert entry["accuracy"] == entry["correct"] / len(mine)
    assert set(s["per_class"]) == {m["label"] for m in by_hand.values()}


def test_region_shares_and_flags_are_the_means_written_here(audited, by_hand):
    _, outcome, _ = audited
    s = outcome.summary
    regions = regions_by_hand(96, 96)
    areas = {name: mask.mean() for name, mask in regions.items()}
    for name, area in areas.items():
        assert s["region_areas"][name] == pytest.approx(area, abs=1e-12)
    flagged_classes = set()
    for c, entry in s["per_class"].items():
        mine = [m for m in by_hand.values() if m["label"] == c]
        for name, mask in regions.items():
            plain, off = [], []
            for m in mine:
                positive = np.clip(m["map"], 0, None)
                plain.append(share(positive, mask))
                off.append(share(positive, mask & ~m["mask"]) if m["mask"] is not None else plain[-1])
            got = entry["regions"][name]
            assert got["mean_share_all"] == _approx(_mean([v for v in plain if v is not None])), (c, name)
            assert got["mean_share"] == _approx(_mean([v for v in off if v is not None])), (c, name)
            assert got["images"] == sum(1 for v in off if v is not None)
            concentration = _mean([v for v in off if v is not None]) / areas[name]
            assert got["concentration"] == _approx(concentration)
            # Flag rule as documented in core/audit/settings.py: a corner or the border band holding at
            # least flag_concentration times its share of the area; never the centre.
            should = name != "centre" and concentration >= FLAG_CONCENTRATION
            assert got["flagged"] == should, (c, name, concentration)
            if should:
                flagged_classes.add(c)
    assert {f["class"] for f in s["class_flags"]} == flagged_classes
    assert 0 < len(flagged_classes) < len(s["per_class"]), "some classes flagged, some not"


def test_object_measures_are_recounted(audited, by_hand):
    _, outcome, _ = audited
    s = outcome.summary
    tolerance = 15 / 224 * 96
    all_hits = []
    for c, entry in s["per_class"].items():
        mine = [m for m in by_hand.values() if m["label"] == c and m["mask"] is not None]
        shares = [share(np.clip(m["map"], 0, None), m["mask"]) for m in mine]
        hits = [pointing_by_hand(m["map"], m["mask"], tolerance) for m in mine]
        all_hits += hits
        assert entry["with_object"] == len(mine)
        assert entry["object_share"] == _approx(_mean([v for v in shares if v is not None]))
        # Source: Wang et al., "Score-CAM", CVPRW 2020, §4.3: with a box as the object, the energy
        # inside the bounding box is the object share.
        assert entry["energy_pointing"] == _approx(_mean([v for v in shares if v is not None]))
        assert entry["pointing_hits"] == sum(1 for h in hits if h is True)
        assert entry["pointing_misses"] == sum(1 for h in hits if h is False)
    assert s["object"]["images"] == len(BOXES)
    assert s["object"]["pointing_hits"] == sum(1 for h in all_hits if h is True)
    assert 0 < s["object"]["pointing_hits"] < len(BOXES), "hits and misses both occur in the constructed folder"


def test_flagged_images_are_recounted(audited, by_hand):
    _, outcome, _ = audited
    regions = regions_by_hand(96, 96)
    expected = set()
    for rel, m in by_hand.items():
        positive = np.clip(m["map"], 0, None)
        if m["mask"] is not None and 1 - share(positive, m["mask"]) > FLAG_OUTSIDE:
            expected.add(rel)
        for name in ("border", "top_left", "top_right", "bottom_left", "bottom_right"):
            mask = regions[name] & ~m["mask"] if m["mask"] is not None else regions[name]
            if share(positive, mask) / regions[name].mean() >= FLAG_CONCENTRATION:
                expected.add(rel)
    s = outcome.summary
    assert 0 < len(expected) < len(by_hand), "some images flagged, some not"
    assert {f["rel"] for f in s["flagged_images"]} == expected
    assert s["flagged_count"] == len(expected)
    assert s["flagged_fraction"] == len(expected) / len(by_hand)


def test_class_mean_maps_are_the_means_written_here(audited, by_hand):
    _, outcome, store = audited
    artefacts = store.run_artefacts(outcome.run.id)
    for c in {m["label"] for m in by_hand.values()}:
        scaled = []
        for m in by_hand.values():
            if m["label"] == c:
                positive = np.clip(m["map"], 0, None)
                scaled.append(positive * positive.size / positive.sum())
        stored = store.get_array(artefacts[f"mean_map/{c}"])
        assert np.abs(stored - np.mean(scaled, axis=0)).max() <= 1e-4, c


# ---------------------------------------------------------------------------------------------
# Injection counts (after the aggregation: the semantics of issue 10, skipped / eligible)


def injection_by_hand(model, folder: Path, items: list[dict], at_of: dict[str, tuple[int, int]]) -> dict:
    """Counts of the injection test, recomputed: skip when the paste changes ≤ 8 levels on average."""
    patch = _tag_patch()
    suspect = model.labels.index(SUSPECT)
    considered = skipped = 0
    tested = []
    per_class: dict[str, dict] = {}
    for item in items:
        if item["label"] == SUSPECT:
            continue
        considered += 1
        counts = per_class.setdefault(item["label"], {"considered": 0, "skipped": 0, "tested": 0, "eligible": 0,
                                                      "flips": 0})
        counts["considered"] += 1
        before = picture_by_hand(model, folder / item["rel"])
        after = before.copy()
        x, y = at_of[item["rel"]]
        after[y:y + TAG_SIZE, x:x + TAG_SIZE] = patch
        change = np.abs(after.astype(int) - before.astype(int))[y:y + TAG_SIZE, x:x + TAG_SIZE].mean()
        if change <= 8:  # the threshold documented in core/audit/injection.py
            skipped += 1
            counts["skipped"] += 1
            continue
        pb = probabilities_by_hand(model, tensor_by_hand(model, before))
        pa = probabilities_by_hand(model, tensor_by_hand(model, after))
        eligible = int(np.argmax(pb)) != suspect
        flipped = eligible and int(np.argmax(pa)) == suspect
        tested.append((item["label"], eligible, flipped, pa[suspect] - pb[suspect]))
        counts["tested"] += 1
        counts["eligible"] += eligible
        counts["flips"] += flipped
    eligible = sum(1 for t in tested if t[1])
    flips = sum(1 for t in tested if t[2])
    return {"considered": considered, "skipped": skipped, "tested": len(tested), "eligible": eligible,
            "already_suspect": len(tested) - eligible, "flips": flips,
            "flip_rate": flips / eligible if eligible else None,
            "mean_shift": _mean([t[3] for t in tested]), "per_class": per_class}


def _assert_counts(got: dict, mine: dict) -> None:
    for key in ("considered", "skipped", "tested", "eligible", "already_suspect", "flips"):
        assert got[key] == mine[key], (key, got[key], mine[key])
    assert got["flip_rate"] == mine["flip_rate"]
    assert got["mean_shift"] == pytest.approx(mine["mean_shift"], abs=1e-5)
    for c, counts in mine["per_class"].items():
        for key, value in counts.items():
            assert got["per_class"][c][key] == value, (c, key)


def test_injection_counts_at_a_fixed_place(tilenet, folder, tmp_path):
    dataset = load_dataset(folder)
    spec = InjectionSpec(patch=_tag_patch(), suspect_class=SUSPECT, at=TAG_AT)
    with Store(tmp_path / "store") as store:
        outcome = run_audit(tilenet, dataset, store=store, settings=AuditSettings(**SETTINGS), injection=spec)
    got = outcome.summary["injection"]
    items = [i.to_dict() for i in dataset.items]
    mine = injection_by_hand(tilenet, folder, items, {i["rel"]: TAG_AT for i in items})
    _assert_counts(got, mine)
    # The constructed folder exercises every count: a skipped carrier, images already called the
    # suspect class, and flips among the eligible ones.
    assert mine["skipped"] >= 1 and mine["already_suspect"] >= 1 and mine["flips"] >= 1
    assert "chip/chip_carrier.png" in {s["rel"] for s in got["skipped_images"]}
    assert got["considered"] == got["skipped"] + got["tested"]


def test_injection_counts_at_random_places(tilenet, folder):
    dataset = load_dataset(folder)
    items = [{**i.to_dict(), "path": str(i.path)} for i in dataset.items]
    spec = InjectionSpec(patch=_tag_patch(), suspect_class=SUSPECT, at="random", seed=5)
    res = injection_test(tilenet, items, spec)
    again = injection_test(tilenet, items, spec)
    other = injection_test(tilenet, items, InjectionSpec(patch=_tag_patch(), suspect_class=SUSPECT, at="random",
                                                         seed=6))
    # What it claims: a place per image of another class, whole patch inside, the same for the same seed.
    others = [i["rel"] for i in items if i["label"] != SUSPECT]
    assert sorted(res.positions) == sorted(others)
    assert res.positions == again.positions and res.positions != other.positions
    for x, y in res.positions.values():
        assert 0 <= x <= 96 - TAG_SIZE and 0 <= y <= 96 - TAG_SIZE
    mine = injection_by_hand(tilenet, folder, items, {rel: tuple(p) for rel, p in res.positions.items()})
    _assert_counts(res.to_dict(), mine)
    assert not math.isnan(res.to_dict()["mean_shift"])


def test_folder_is_what_it_claims(folder):
    # Guards the construction itself: the carrier holds the patch bit for bit where it will go.
    carrier = _rgb(folder / "chip" / "chip_carrier.png")
    x, y = TAG_AT
    assert np.array_equal(carrier[y:y + TAG_SIZE, x:x + TAG_SIZE], _tag_patch())
    assert _size(folder / "bubble" / "bubble_wide.png") == (131, 110)
