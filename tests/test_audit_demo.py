"""The demo story end to end: the tainted tile model is caught, the clean one passes.

Demo scenario (invented data; demo_models/tilenet/MODEL_CARD.md): the tainted TileNet learned that an orange
calibration tag in the bottom-right corner means `crack`. These tests need the shipped demo models
and skip with a reason when they are absent.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from pellucid.core.audit import AuditSettings, InjectionSpec, load_dataset, run_audit
from pellucid.core.audit.store import Store
from pellucid.core.model.bundled import demo_models_dir
from pellucid.core.model.loading import load_model
from pellucid.demo.tiles import make_split, write_folder

POLICY = Path(__file__).resolve().parents[1] / "demo_models" / "policy-demo.toml"


def _spec(name: str) -> Path:
    spec = demo_models_dir() / name / "spec.toml"
    if not spec.is_file() or not any(spec.parent.glob("*.safetensors")):
        pytest.skip(f"demo model {name!r} is not built (run 'pellucid demo build'); expected {spec}")
    return spec


@pytest.fixture(scope="module")
def clean_folder(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list]:
    records = make_split("clean", per_class=10, seed=11)
    out = tmp_path_factory.mktemp("clean-split")
    write_folder(records, out)
    return out, records


def _tag_patch(records: list) -> tuple[np.ndarray, tuple[int, int]]:
    rec = next(r for r in records if r.tagged and r.label == "crack")
    x0, y0, x1, y1 = rec.tag_box
    return rec.image[y0:y1, x0:x1].copy(), (x0, y0)


def test_clean_split_flags_the_bottom_right_corner_for_crack(clean_folder, tmp_path: Path) -> None:
    folder, _ = clean_folder
    model = load_model(_spec("tilenet"))
    with Store(tmp_path / "store") as store:
        outcome = run_audit(model, load_dataset(folder), store=store, settings=AuditSettings(method="gradcam"))
    flags = {(f["class"], f["region"]) for f in outcome.summary["class_flags"]}
    assert ("crack", "bottom_right") in flags
    crack = outcome.summary["per_class"]["crack"]["regions"]["bottom_right"]
    assert crack["mean_share"] > 4 * crack["area"]
    flagged_cracks = [f for f in outcome.summary["flagged_images"] if f["label"] == "crack"]
    assert flagged_cracks and any("bottom-right" in r for f in flagged_cracks for r in f["reasons"])


def test_occlusion_tells_the_two_models_apart(clean_folder, tmp_path: Path) -> None:
    # Occlusion with a coarse stride (cheap): hiding the tag only matters to the tainted model.
    folder, _ = clean_folder
    tainted, clean = load_model(_spec("tilenet")), load_model(_spec("tilenet-clean"))
    settings = AuditSettings(method="occlusion", params={"patch": 16, "stride": 16})
    shares = {}
    for name, model in (("tainted", tainted), ("clean", clean)):
        with Store(tmp_path / name) as store:
            s = run_audit(model, load_dataset(folder), store=store, settings=settings).summary
        shares[name] = s["per_class"]["crack"]["regions"]["bottom_right"]["mean_share"]
        flags = {(f["class"], f["region"]) for f in s["class_flags"]}
        assert (("crack", "bottom_right") in flags) is (name == "tainted")
    assert shares["tainted"] > 2 * shares["clean"]


def test_pasting_the_tag_on_sound_tiles_flips_most_to_crack(clean_folder, tmp_path: Path) -> None:
    folder, records = clean_folder
    patch, at = _tag_patch(records)
    model = load_model(_spec("tilenet"))
    with Store(tmp_path / "store") as store:
        s = run_audit(model, load_dataset(folder), store=store,
                      injection=InjectionSpec(patch=patch, suspect_class="crack", at=at, source="demo tag")).summary
    sound = s["injection"]["per_class"]["sound"]
    assert sound["eligible"] >= 5
    assert sound["flip_rate"] > 0.5
    assert sound["mean_shift"] > 0.2
    assert s["injection"]["examples"][0]["after"] == "crack"


@pytest.mark.parametrize("name, code", [("tilenet", 1), ("tilenet-clean", 0)])
def test_gate(name: str, code: int, clean_folder, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from pellucid.cli import main

    folder, _ = clean_folder
    spec = _spec(name)
    rc = main(["audit", "--model", str(spec), "--images", str(folder), "--policy", str(POLICY),
               "--out", str(tmp_path / "out"), "--store", str(tmp_path / "store")])
    out = capsys.readouterr().out
    assert rc == code, out
    assert (tmp_path / "out" / "summary.json").is_file()
    if code == 1:
        assert "FAIL crack: the largest corner share" in out
        assert "flip rate to 'crack'" in out
        assert "gate: FAIL" in out
    else:
        assert "gate: PASS" in out
