"""A policy written back as TOML reads back as the same policy, whatever its text and labels hold.

The reader side is Python's own ``tomllib`` (the TOML 1.0 reader in the standard library) and the
command line's ``load_policy``; the writer is ``core/audit/policy_toml.py``.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest
from conftest import png_bytes

from pellucid.core.audit.command import audit_command, param_items
from pellucid.core.audit.cost import audit_cost
from pellucid.core.audit.policy import load_policy, parse_policy
from pellucid.core.audit.policy_library import PolicyLibrary
from pellucid.core.audit.policy_toml import policy_toml
from pellucid.core.errors import BadParameterError

AWKWARD = {
    "name": 'gate "β" \\ line',
    "description": "first line\nsecond line\twith a tab, a DEL \x7f and an emoji 🧪",
    "thresholds": {"min_accuracy": 0.125, "max_failed_images": 3, "max_injection_shift": -0.05},
    "classes": {"great white shark": {"max_corner_share": 0.1}, "a.b": {"min_class_accuracy": 1},
                "crack": {"max_border_share": 1e-05}},
    "injection": {"patch": "/somewhere/mark.png", "suspect_class": "tiger cat", "at": "random", "seed": 7,
                  "limit": 40},
    "audit": {"method": "occlusion", "params": {"patch": 8, "stride": 4, "baseline": "blur"}, "target": "predicted"},
}


def test_awkward_policy_round_trips_through_tomllib() -> None:
    original = parse_policy(AWKWARD)
    text = policy_toml(original, patch="/somewhere/mark.png")
    again = parse_policy(tomllib.loads(text))  # Source: Python's tomllib, the standard TOML reader
    assert again.name == AWKWARD["name"] and again.description == AWKWARD["description"]
    assert again.thresholds == original.thresholds and again.classes == original.classes
    assert again.injection == original.injection
    assert (again.method, again.params, again.target) == ("occlusion", AWKWARD["audit"]["params"], "predicted")


def test_a_fixed_place_writes_no_seed_and_an_injection_needs_its_patch_path() -> None:
    data = {**AWKWARD, "injection": {"patch": "p.png", "suspect_class": "crack", "at": [3, 4]}}
    text = policy_toml(parse_policy(data), patch="p.png")
    assert "seed" not in tomllib.loads(text)["injection"]  # the parser refuses a seed with a fixed place
    with pytest.raises(ValueError, match="patch"):
        policy_toml(parse_policy(data))


def test_library_saves_a_file_the_loader_reads_and_downloads_absolute(tmp_path: Path) -> None:
    lib = PolicyLibrary(tmp_path / "data")
    patch = lib.put_patch(png_bytes(np.full((6, 3, 3), 9, np.uint8)), name="mark.png")
    assert (patch.width, patch.height) == (3, 6)
    data = {k: v for k, v in AWKWARD.items() if k != "injection"}
    data["injection"] = {"suspect_class": "crack", "at": [1, 2]}
    saved = lib.save("gate-1", data, patch_id=patch.id)
    text = (tmp_path / "data" / "policies" / "gate-1.toml").read_text(encoding="utf-8")
    assert f'patch = "../patches/{patch.id}.png"' in text
    assert saved.injection.patch.resolve() == patch.path.resolve()
    moved = tmp_path / "elsewhere.toml"
    moved.write_text(lib.download("gate-1"), encoding="utf-8")
    assert load_policy(moved).injection.patch.resolve() == patch.path.resolve()
    assert [e.name for e in lib.entries()] == ["gate-1"]
    with pytest.raises(BadParameterError, match="policy name"):
        lib.save("../x", data, patch_id=patch.id)


def test_command_line_and_cost_are_plain_sums() -> None:
    line = audit_command(model="m", images="/d i r", out="o", method="occlusion", target="label",
                         params=param_items({"stride": 4, "flag": True}), inject_at="random", inject_seed=2)
    assert line == ("pellucid audit --model m --images '/d i r' --out o --method occlusion --param stride=4 "
                    "--param flag=true --target label --inject-at random --inject-seed 2")
    cost = audit_cost(images=10, forwards_per_image=3.0, seconds_per_forward=0.5, injection_images=4,
                      confirm_clusters=2, confirm_limit=5)
    # By hand: 10 × 3 forwards, 4 × 2 for the injection; confirmation at most 2 × 3 × min(5, 10).
    assert cost.seconds == pytest.approx((30 + 8) * 0.5)
    assert cost.seconds_max == pytest.approx((30 + 8 + 30) * 0.5)
