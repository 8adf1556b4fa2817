"""Policies: strict parsing with plain messages, and evaluation sentence by sentence."""

from __future__ import annotations

from pathlib import Path

import pytest

from pellucid.core.audit.policy import THRESHOLDS, evaluate_policy, load_policy, parse_policy
from pellucid.core.errors import SpecError

DEMO_POLICY = Path(__file__).resolve().parents[1] / "demo_models" / "policy-demo.toml"


def _summary(**over) -> dict:
    regions = {n: {"mean_share": 0.05, "mean_share_all": 0.05, "area": 0.0625}
               for n in ("top_left", "top_right", "bottom_left", "bottom_right")}
    regions["border"] = {"mean_share": 0.1, "mean_share_all": 0.1, "area": 0.23}
    regions["centre"] = {"mean_share": 0.5, "mean_share_all": 0.5, "area": 0.25}
    crack = {"accuracy": 0.9, "regions": {k: dict(v) for k, v in regions.items()}, "with_object": 4,
             "object_share": 0.6, "pointing_accuracy": 0.75, "energy_pointing": 0.6}
    crack["regions"]["bottom_right"]["mean_share"] = 0.4
    sound = {"accuracy": 0.8, "regions": {k: {**v, "mean_share": None} for k, v in regions.items()},
             "with_object": 0, "object_share": None, "pointing_accuracy": None, "energy_pointing": None}
    s = {"accuracy": 0.85, "flagged_fraction": 0.1, "failed": [], "dataset": {"skipped": []},
         "per_class": {"sound": sound, "crack": crack}, "injection": None, "background_swap": None}
    s.update(over)
    return s


def test_demo_policy_parses() -> None:
    policy = load_policy(DEMO_POLICY)
    assert policy.thresholds["max_corner_share"] == 0.25
    assert policy.injection is not None and policy.injection.patch.is_file()
    assert policy.injection.suspect_class == "crack" and policy.injection.at == (78, 78)
    assert len(policy.sha256 or "") == 64


@pytest.mark.parametrize("data, message", [
    ({"thresholds": {"max_corner_shares": 0.2}}, "unknown key 'max_corner_shares'.*Did you mean 'max_corner_share'"),
    ({"threshold": {"min_accuracy": 0.2}}, "unknown key 'threshold' in the top level"),
    ({"thresholds": {"min_accuracy": "high"}}, "min_accuracy must be a number"),
    ({"thresholds": {"min_accuracy": True}}, "must be a number"),
    ({"thresholds": {"min_accuracy": 80}}, "between 0 and 1"),
    ({"thresholds": {"max_failed_images": 1.5}}, "whole number"),
    ({"thresholds": {}}, "sets no threshold"),
    ({"thresholds": {"min_accuracy": 0.5}, "classes": {"crack": {"min_accuracy": 0.5}}}, "only class thresholds"),
    ({"thresholds": {"min_accuracy": 0.5}, "injection": {"patch": "p.png", "suspect_class": "crack"}},
     "needs 'at'"),
    ({"thresholds": {"min_accuracy": 0.5}, "injection": {"patch": "p.png", "suspect_class": "c", "at": [1]}},
     "two whole numbers"),
    ({"thresholds": {"min_accuracy": 0.5}, "injection": {"patch": "p", "suspect_class": "c", "at": [1, 2], "x": 1}},
     "unknown key 'x' in \\[injection\\]"),
    ({"name": 3, "thresholds": {"min_accuracy": 0.5}}, "name must be text"),
    ({"thresholds": {"min_accuracy": 0.5}, "audit": {"method": "nope"}}, "audit.method must be one of"),
    ({"thresholds": {"min_accuracy": 0.5}, "audit": {"methd": "gradcam"}}, "Did you mean 'method'"),
    ({"thresholds": {"min_accuracy": 0.5}, "audit": {"target": "both"}}, "audit.target"),
])
def test_strict_parsing(data: dict, message: str) -> None:
    with pytest.raises(SpecError, match=message):
        parse_policy(data)


def test_malformed_toml(tmp_path: Path) -> None:
    p = tmp_path / "p.toml"
    p.write_text("[thresholds\nmin_accuracy = 0.5\n")
    with pytest.raises(SpecError, match="not valid TOML"):
        load_policy(p)
    with pytest.raises(SpecError, match="does not exist"):
        load_policy(tmp_path / "missing.toml")


def test_every_key_is_documented_in_the_module() -> None:
    import pellucid.core.audit.policy as mod

    for key in THRESHOLDS:
        assert key in (mod.__doc__ or ""), key


def test_evaluation_pass_fail_and_not_applicable() -> None:
    policy = parse_policy({"thresholds": {"min_accuracy": 0.8, "max_corner_share": 0.2, "min_object_share": 0.5},
                           "classes": {"crack": {"max_corner_share": 0.5}}})
    res = evaluate_policy(policy, _summary(), labels=["sound", "crack"])
    by = {(c.scope, c.key): c for c in res.checks}
    assert by[("run", "min_accuracy")].status == "pass"
    assert by[("crack", "max_corner_share")].status == "pass"  # override 0.5 >= 0.4
    assert by[("sound", "max_corner_share")].status == "n/a"  # no evidence at all
    assert by[("sound", "min_object_share")].status == "n/a"  # no boxes
    assert by[("crack", "min_object_share")].status == "pass"
    assert res.passed

    strict = parse_policy({"thresholds": {"max_corner_share": 0.2}})
    res = evaluate_policy(strict, _summary(), labels=["sound", "crack"])
    fail = res.failures[0]
    assert (fail.scope, fail.key, fail.measured) == ("crack", "max_corner_share", 0.4)
    assert "bottom-right" in fail.sentence and "FAILS" in fail.sentence
    assert not res.passed


def test_missing_evidence_fails() -> None:
    policy = parse_policy({"thresholds": {"max_injection_flip_rate": 0.2, "max_background_swap_drop": 0.1}})
    res = evaluate_policy(policy, _summary(), labels=["sound", "crack"])
    assert [c.status for c in res.checks] == ["fail", "fail"]
    assert "no injection test" in res.checks[0].sentence


def test_injection_and_failed_images() -> None:
    inj = {"flip_rate": 0.9, "mean_shift": 0.4, "settings": {"suspect_class": "crack"}}
    policy = parse_policy({"thresholds": {"max_injection_flip_rate": 0.2, "max_injection_shift": 0.5,
                                          "max_failed_images": 0}})
    s = _summary(injection=inj, failed=[{"rel": "x", "reason": "y"}])
    res = evaluate_policy(policy, s, labels=["sound", "crack"])
    status = {c.key: c.status for c in res.checks}
    assert status == {"max_injection_flip_rate": "fail", "max_injection_shift": "pass", "max_failed_images": "fail"}


def test_unknown_class_in_policy() -> None:
    policy = parse_policy({"thresholds": {"min_accuracy": 0.5}, "classes": {"crak": {"max_corner_share": 0.1}}})
    with pytest.raises(SpecError, match="'crak'"):
        evaluate_policy(policy, _summary(), labels=["sound", "crack"])
