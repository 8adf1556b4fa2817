"""Policies: thresholds that turn an audit into pass or fail (the deployment gate).

A policy is a TOML file with plain key names. Every key is optional except that at least one
threshold must be set; unknown keys and wrong types are errors, so a typo cannot silently disable
a check. Example::

    name = "Tile line gate"
    description = "What a tile inspector must show before it runs on the line."

    [thresholds]                   # apply to the whole run, or to every class
    min_accuracy = 0.85            # run: share of images predicted correctly
    min_class_accuracy = 0.6       # each class: share of its images predicted correctly
    max_corner_share = 0.2         # each class: mean share of its evidence in any one corner box, off the object
    max_border_share = 0.4         # each class: mean share of its evidence in the border band, off the object
    min_object_share = 0.3         # each class with boxes/masks: mean share of its evidence on the object
    min_pointing_accuracy = 0.5    # each class with boxes/masks: pointing-game hits / (hits + misses)
    min_energy_pointing = 0.3      # each class with boxes/masks: mean energy-based pointing score
    max_flagged_fraction = 0.25    # run: share of images in the flagged list
    max_injection_flip_rate = 0.2  # run: share of other-class images that flip to the suspect class
    max_injection_shift = 0.2      # run: mean rise of the suspect class's probability after pasting
    max_background_swap_drop = 0.1 # run: accuracy lost when the background is replaced
    max_failed_images = 0          # run: images that could not be read or audited
    max_confirmed_shortcuts = 0    # run: clusters confirmed as shortcuts (0 when not set and confirmation ran)

    [classes.crack]                # per-class overrides of the class thresholds
    max_corner_share = 0.15

    [audit]                        # how the evidence is measured (the thresholds depend on it)
    method = "occlusion"           # any registered attribution method; the command line may override
    params = { patch = 16, stride = 8 }
    target = "label"               # explain the true label (default) or "predicted"

    [injection]                    # the suspect patch for the injection test
    patch = "tag.png"              # a picture file, relative to this policy file
    suspect_class = "crack"
    at = [78, 78]                  # top-left (x, y) in model-input pixels, or "random" (one place per image)
    seed = 0                       # optional, with at = "random": the places are drawn from it
    limit = 500                    # optional: at most this many images

A threshold whose measure the audit did not produce (an injection limit without an injection
test, an object threshold on a folder without boxes) fails with a sentence saying so: missing
evidence is not a pass. A class whose measure is undefined (no positive evidence at all, or no
boxes for that class) is reported as not applicable and does not fail the gate.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import time
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from pellucid.core.errors import SpecError

__all__ = [
    "AUDIT_KEYS",
    "CLASS_THRESHOLDS",
    "INJECTION_KEYS",
    "RUN_THRESHOLDS",
    "THRESHOLDS",
    "UNITS",
    "Check",
    "InjectionPolicy",
    "Policy",
    "PolicyResult",
    "evaluate_policy",
    "failed_first",
    "gate_of",
    "gate_sentence",
    "load_policy",
    "parse_policy",
    "policy_keys",
]

# key → (scope, kind, comparison, what it measures)
THRESHOLDS: dict[str, tuple[str, str, str, str]] = {
    "min_accuracy": ("run", "fraction", ">=", "share of all images predicted correctly"),
    "min_class_accuracy": ("class", "fraction", ">=", "share of the class's images predicted correctly"),
    "max_corner_share": ("class", "fraction", "<=",
                         "mean share of the class's positive evidence in any one corner box (where boxes or masks "
                         "are given, only evidence outside them counts)"),
    "max_border_share": ("class", "fraction", "<=",
                         "mean share of the class's positive evidence in the border band (where boxes or masks "
                         "are given, only evidence outside them counts)"),
    "min_object_share": ("class", "fraction", ">=", "mean share of the class's positive evidence on the object"),
    "min_pointing_accuracy": ("class", "fraction", ">=",
                              ("pointing game: how often the map's maximum lands on the object (tolerance 15/224 of "
                               "the input's shorter side)")),
    "min_energy_pointing": ("class", "fraction", ">=",
                            "energy-based pointing game: mean share of the map's energy in the object box"),
    "max_flagged_fraction": ("run", "fraction", "<=", "share of audited images in the flagged list"),
    "max_injection_flip_rate": ("run", "fraction", "<=",
                                ("flips / eligible: share of the other-class images the patch changed and the model "
                                 "did not already call the suspect class whose prediction flips to it")),
    "max_injection_shift": ("run", "signed", "<=",
                            "mean rise of the suspect class's probability over the images the pasted patch changed"),
    "max_background_swap_drop": ("run", "signed", "<=",
                                 "accuracy lost when each object's background is replaced by another image's"),
    "max_failed_images": ("run", "count", "<=", "images that could not be read or audited"),
    "max_confirmed_shortcuts": ("run", "count", "<=",
                                ("clusters of maps that discovery found and confirmation confirmed: taking their "
                                 "evidence region away loses the calls, and putting it into other images flips them")),
}
# Checked at this limit when a policy does not set it and the audit ran confirmation (the default
# audit does): a policy written before discovery existed still fails a confirmed shortcut.
DEFAULT_MAX_CONFIRMED_SHORTCUTS = 0.0
# What a threshold's number is, by its kind: the editor and the README show it beside each key.
UNITS: dict[str, str] = {
    "fraction": "a share from 0 to 1 (0.2 = 20%)",
    "signed": "a change from -1 to 1 (in probability or accuracy)",
    "count": "a whole number of images or clusters, 0 or more",
}
# The [injection] and [audit] keys, with what each means (the policy editor lists them from here).
INJECTION_KEYS: dict[str, str] = {
    "patch": "the suspect patch: a picture file, relative to the policy file",
    "suspect_class": "the class the patch is suspected to cue (a label of the model)",
    "at": "top-left [x, y] in model-input pixels where the patch is pasted, or \"random\" (one place per image)",
    "seed": "with at = \"random\": the places are drawn from this seed (whole number, 0 or more)",
    "limit": "test at most this many images (whole number, 1 or more; none: every image of the other classes)",
}
AUDIT_KEYS: dict[str, str] = {
    "method": "the attribution method the thresholds were set for; the command line may override it",
    "params": "the method's parameters, e.g. { patch = 16, stride = 8 } for occlusion",
    "target": "\"label\" explains each image's true label (default), \"predicted\" the model's call",
}
CLASS_THRESHOLDS = tuple(k for k, v in THRESHOLDS.items() if v[0] == "class")
RUN_THRESHOLDS = tuple(k for k, v in THRESHOLDS.items() if v[0] == "run")
_TOP_KEYS = {"name", "description", "thresholds", "classes", "injection", "audit"}
_INJECTION_KEYS = set(INJECTION_KEYS)
_AUDIT_KEYS = set(AUDIT_KEYS)


@dataclass(frozen=True)
class InjectionPolicy:
    patch: Path
    suspect_class: str
    at: tuple[int, int] | str  # (x, y) or "random"
    limit: int | None = None
    seed: int = 0

    def to_dict(self) -> dict:
        return {"patch": str(self.patch), "suspect_class": self.suspect_class,
                "at": self.at if isinstance(self.at, str) else list(self.at), "limit": self.limit, "seed": self.seed}


@dataclass(frozen=True)
class Policy:
    name: str
    description: str
    thresholds: dict[str, float]
    classes: dict[str, dict[str, float]]
    injection: InjectionPolicy | None
    path: Path | None = None
    sha256: str | None = None
    method: str | None = None
    params: dict = field(default_factory=dict)
    target: str | None = None

    def to_dict(self) -> dict:
        return {"name": self.name, "description": self.description, "thresholds": dict(self.thresholds),
                "classes": {k: dict(v) for k, v in self.classes.items()},
                "injection": self.injection.to_dict() if self.injection else None,
                "method": self.method, "params": dict(self.params), "target": self.target,
                "path": str(self.path) if self.path else None, "sha256": self.sha256}


def _where(path: Path | None) -> str:
    return f"policy {str(path)!r}" if path else "the policy"


def _unknown(key: str, allowed: set[str] | tuple[str, ...], where: str, table: str) -> SpecError:
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    return SpecError(
        f"{where}: unknown key {key!r} in {table}.{hint} Allowed keys: {', '.join(sorted(allowed))}"
    )


def _threshold(key: str, value: Any, where: str, table: str) -> float:
    kind = THRESHOLDS[key][1]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise SpecError(f"{where}: {table}.{key} must be a number; received {value!r}")
    if kind == "fraction" and not 0.0 <= value <= 1.0:
        raise SpecError(f"{where}: {table}.{key} is a share and must lie between 0 and 1 (e.g. 0.2 for 20%); "
                        f"received {value!r}")
    if kind == "signed" and not -1.0 <= value <= 1.0:
        raise SpecError(f"{where}: {table}.{key} is a change in probability or accuracy and must lie between -1 "
                        f"and 1; received {value!r}")
    if kind == "count" and (not float(value).is_integer() or value < 0):
        raise SpecError(f"{where}: {table}.{key} is a count and must be a whole number >= 0; received {value!r}")
    return float(value)


def parse_policy(data: dict, *, path: Path | None = None, sha256: str | None = None) -> Policy:
    """Check a decoded TOML table strictly and build a :class:`Policy`."""
    where = _where(path)
    for key in data:
        if key not in _TOP_KEYS:
            raise _unknown(key, _TOP_KEYS, where, "the top level")
    for key in ("name", "description"):
        if key in data and not isinstance(data[key], str):
            raise SpecError(f"{where}: {key} must be text; received {data[key]!r}")
    thresholds_raw = data.get("thresholds", {})
    if not isinstance(thresholds_raw, dict):
        raise SpecError(f"{where}: [thresholds] must be a table of keys; received {thresholds_raw!r}")
    thresholds: dict[str, float] = {}
    for key, value in thresholds_raw.items():
        if key not in THRESHOLDS:
            raise _unknown(key, tuple(THRESHOLDS), where, "[thresholds]")
        thresholds[key] = _threshold(key, value, where, "thresholds")
    classes_raw = data.get("classes", {})
    if not isinstance(classes_raw, dict):
        raise SpecError(f"{where}: [classes] must hold one table per class, e.g. [classes.crack]")
    classes: dict[str, dict[str, float]] = {}
    for label, table in classes_raw.items():
        if not isinstance(table, dict):
            raise SpecError(f"{where}: classes.{label} must be a table of thresholds; received {table!r}")
        classes[label] = {}
        for key, value in table.items():
            if key not in CLASS_THRESHOLDS:
                raise _unknown(key, CLASS_THRESHOLDS, where, f"[classes.{label}] (only class thresholds)")
            classes[label][key] = _threshold(key, value, where, f"classes.{label}")
    if not thresholds and not any(classes.values()):
        raise SpecError(f"{where} sets no threshold; add a [thresholds] table, e.g. min_accuracy = 0.8")
    injection = None
    if "injection" in data:
        inj = data["injection"]
        if not isinstance(inj, dict):
            raise SpecError(f"{where}: [injection] must be a table with patch, suspect_class and at")
        for key in inj:
            if key not in _INJECTION_KEYS:
                raise _unknown(key, _INJECTION_KEYS, where, "[injection]")
        for key in ("patch", "suspect_class", "at"):
            if key not in inj:
                raise SpecError(f"{where}: [injection] needs {key!r} (patch, suspect_class and at are required)")
        if not isinstance(inj["patch"], str) or not inj["patch"]:
            raise SpecError(f"{where}: injection.patch must be a file path; received {inj['patch']!r}")
        if not isinstance(inj["suspect_class"], str) or not inj["suspect_class"]:
            raise SpecError(f"{where}: injection.suspect_class must be a class label; "
                            f"received {inj['suspect_class']!r}")
        at = inj["at"]
        if at != "random" and (not isinstance(at, list) or len(at) != 2
                               or any(isinstance(v, bool) or not isinstance(v, int) for v in at)):
            raise SpecError(f"{where}: injection.at must be two whole numbers [x, y] or \"random\"; received {at!r}")
        limit = inj.get("limit")
        if limit is not None and (isinstance(limit, bool) or not isinstance(limit, int) or limit < 1):
            raise SpecError(f"{where}: injection.limit must be a whole number >= 1; received {limit!r}")
        seed = inj.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise SpecError(f"{where}: injection.seed must be a whole number >= 0; received {seed!r}")
        if "seed" in inj and at != "random":
            raise SpecError(f"{where}: injection.seed only applies with at = \"random\"; remove it or paste at "
                            "random places")
        base = path.parent if path else Path(".")
        patch = Path(inj["patch"]).expanduser()
        injection = InjectionPolicy(patch=patch if patch.is_absolute() else base / patch,
                                    suspect_class=inj["suspect_class"],
                                    at="random" if at == "random" else (int(at[0]), int(at[1])), limit=limit,
                                    seed=seed)
    method, params, target = _audit_table(data.get("audit"), where)
    return Policy(name=data.get("name", path.stem if path else "policy"), description=data.get("description", ""),
                  thresholds=thresholds, classes=classes, injection=injection, path=path, sha256=sha256,
                  method=method, params=params, target=target)


def _audit_table(table: Any, where: str) -> tuple[str | None, dict, str | None]:
    if table is None:
        return None, {}, None
    if not isinstance(table, dict):
        raise SpecError(f"{where}: [audit] must be a table with method, params and target")
    for key in table:
        if key not in _AUDIT_KEYS:
            raise _unknown(key, _AUDIT_KEYS, where, "[audit]")
    method = table.get("method")
    if method is not None:
        from pellucid.core.attribution import method_names

        if not isinstance(method, str) or method not in method_names():
            raise SpecError(f"{where}: audit.method must be one of {', '.join(method_names())}; received {method!r}")
    params = table.get("params", {})
    if not isinstance(params, dict) or any(isinstance(v, (dict, list)) for v in params.values()):
        raise SpecError(f"{where}: audit.params must be a table of plain values, e.g. {{ stride = 8 }}; "
                        f"received {params!r}")
    target = table.get("target")
    if target is not None and target not in ("label", "predicted"):
        raise SpecError(f"{where}: audit.target must be \"label\" or \"predicted\"; received {target!r}")
    return method, dict(params), target


def policy_keys() -> dict:
    """Every key a policy may hold, with its scope, unit and meaning (for forms and documentation)."""
    return {
        "thresholds": [{"key": k, "scope": scope, "kind": kind, "unit": UNITS[kind],
                        "comparison": cmp, "meaning": meaning}
                       for k, (scope, kind, cmp, meaning) in THRESHOLDS.items()],
        "injection": [{"key": k, "meaning": v} for k, v in INJECTION_KEYS.items()],
        "audit": [{"key": k, "meaning": v} for k, v in AUDIT_KEYS.items()],
    }


def load_policy(path: str | Path) -> Policy:
    p = Path(path).expanduser()
    if not p.is_file():
        raise SpecError(f"policy {str(p)!r} does not exist or is not a file; give a TOML policy file")
    raw = p.read_bytes()
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise SpecError(f"policy {str(p)!r} is not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"policy {str(p)!r} is not valid TOML: {exc}") from None
    return parse_policy(data, path=p, sha256=hashlib.sha256(raw).hexdigest())


@dataclass(frozen=True)
class Check:
    key: str
    scope: str  # "run" or a class label
    measured: float | None
    threshold: float
    comparison: str
    status: str  # "pass", "fail" or "n/a"
    sentence: str
    detail: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.status != "fail"

    def to_dict(self) -> dict:
        return {"key": self.key, "scope": self.scope, "measured": self.measured, "threshold": self.threshold,
                "comparison": self.comparison, "status": self.status, "sentence": self.sentence,
                "meaning": THRESHOLDS[self.key][3], **({"detail": self.detail} if self.detail else {})}


@dataclass(frozen=True)
class PolicyResult:
    policy: Policy
    checks: tuple[Check, ...]

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)

    @property
    def failures(self) -> list[Check]:
        return [c for c in self.checks if c.status == "fail"]

    def to_dict(self) -> dict:
        """The gate record stored with a run: failed checks first, each with value, limit and outcome."""
        ordered = [c for c in self.checks if c.status == "fail"] + [c for c in self.checks if c.status != "fail"]
        return {"passed": self.passed, "policy": self.policy.to_dict(),
                "checks": [c.to_dict() for c in ordered],
                "failed": [f"{c.scope}: {c.key}" for c in self.failures],
                "evaluated": time.time()}


def gate_of(run: Any) -> dict | None:
    """The gate stored with a run (``RunRecord.gate``; runs stored before that kept it in the summary)."""
    gate = getattr(run, "gate", None)
    if gate:
        return gate
    summary = getattr(run, "summary", None) or {}
    return summary.get("gate") if isinstance(summary.get("gate"), dict) else None


def failed_first(checks: list[dict]) -> list[dict]:
    """Checks with the failures first, the rest in their order (for records stored before that order)."""
    return [c for c in checks if c.get("status") == "fail"] + [c for c in checks if c.get("status") != "fail"]


def gate_sentence(gate: dict) -> str:
    """One line: the verdict, the policy (name and sha256) and how many checks failed."""
    policy = gate.get("policy") or {}
    checks = gate.get("checks") or []
    failed = sum(1 for c in checks if c.get("status") == "fail")
    sha = policy.get("sha256")
    named = f"policy {policy.get('name')!r}" + (f" (sha256 {sha[:12]}…)" if sha else "")
    if gate.get("passed"):
        return f"gate: PASS — all {len(checks)} check(s) of {named} hold"
    return f"gate: FAIL — {failed} of {len(checks)} check(s) of {named} failed"


def _fmt(key: str, value: float) -> str:
    kind = THRESHOLDS[key][1]
    if kind == "count":
        return f"{int(value)}"
    if kind == "signed":
        return f"{value:+.3f}"
    return f"{100 * value:.1f}%"


def _judge(key: str, scope: str, measured: float | None, threshold: float, *, what: str,
           missing: str | None = None, na: str | None = None, detail: dict | None = None) -> Check:
    cmp = THRESHOLDS[key][2]
    if measured is None:
        if na is not None:
            return Check(key, scope, None, threshold, cmp, "n/a", f"{scope}: {key} not applicable — {na}.")
        return Check(key, scope, None, threshold, cmp, "fail",
                     f"{scope}: {key} could not be checked — {missing or 'the audit did not measure it'}; "
                     "missing evidence does not pass the gate.")
    ok = measured >= threshold if cmp == ">=" else measured <= threshold
    word = "at least" if cmp == ">=" else "at most"
    verdict = "holds" if ok else "FAILS"
    return Check(key, scope, float(measured), threshold, cmp, "pass" if ok else "fail",
                 f"{scope}: {what} is {_fmt(key, measured)}; the policy allows {word} {_fmt(key, threshold)} — "
                 f"{verdict}.", detail or {})


def _class_check(key: str, label: str, stats: dict, threshold: float) -> Check:
    regions = stats["regions"]
    off = " off the object" if stats.get("with_object") else ""
    if key == "min_class_accuracy":
        return _judge(key, label, stats["accuracy"], threshold, what="accuracy")
    if key == "max_corner_share":
        corners = {n: regions[n]["mean_share"] for n in ("top_left", "top_right", "bottom_left", "bottom_right")}
        defined = {n: v for n, v in corners.items() if v is not None}
        if not defined:
            return _judge(key, label, None, threshold, what="", na="no image of this class has positive evidence")
        worst = max(defined, key=lambda n: defined[n])
        return _judge(key, label, defined[worst], threshold,
                      what=f"the largest corner share of evidence{off} ({worst.replace('_', '-')})",
                      detail={"region": worst, "corners": corners})
    if key == "max_border_share":
        v = regions["border"]["mean_share"]
        return _judge(key, label, v, threshold, what=f"the border band's share of evidence{off}",
                      na="no image of this class has positive evidence")
    if stats["with_object"] == 0:
        return _judge(key, label, None, threshold, what="", na="no image of this class has an object box or mask")
    if key == "min_object_share":
        return _judge(key, label, stats["object_share"], threshold, what="the share of evidence on the object",
                      na="no image of this class has positive evidence")
    if key == "min_pointing_accuracy":
        return _judge(key, label, stats["pointing_accuracy"], threshold, what="pointing-game accuracy",
                      na="no map of this class points anywhere")
    if key == "min_energy_pointing":
        return _judge(key, label, stats["energy_pointing"], threshold, what="energy-based pointing score",
                      na="no image of this class has positive evidence")
    raise AssertionError(key)


def _run_check(key: str, summary: dict, threshold: float) -> Check:
    if key == "min_accuracy":
        return _judge(key, "run", summary.get("accuracy"), threshold, what="accuracy over all images")
    if key == "max_flagged_fraction":
        return _judge(key, "run", summary.get("flagged_fraction"), threshold, what="the share of flagged images")
    if key == "max_failed_images":
        n = len(summary.get("failed", [])) + len((summary.get("dataset") or {}).get("skipped", []))
        return _judge(key, "run", float(n), threshold, what="the number of images that could not be read or audited")
    inj = summary.get("injection")
    if key in ("max_injection_flip_rate", "max_injection_shift"):
        if not inj:
            return _judge(key, "run", None, threshold, what="",
                          missing="the audit ran no injection test (give [injection] in the policy or --inject-patch)")
        if key == "max_injection_flip_rate":
            counts = (f" ({inj.get('flips', 0)} of {inj.get('eligible', 0)} eligible; {inj.get('tested', 0)} tested, "
                      f"{inj.get('skipped', 0)} skipped because they already carry the patch)")
            return _judge(key, "run", inj.get("flip_rate"), threshold,
                          what=f"the flip rate to {inj['settings']['suspect_class']!r} after pasting the patch{counts}",
                          missing=("no tested image could flip (all were already predicted as the suspect class or "
                                   "already carried the patch)"))
        return _judge(key, "run", inj.get("mean_shift"), threshold,
                      what=(f"the mean change of p({inj['settings']['suspect_class']}) after pasting the patch, over "
                            f"{inj.get('tested', 0)} tested image(s)"))
    if key == "max_confirmed_shortcuts":
        conf = summary.get("confirmation")
        if not conf:
            return _judge(key, "run", None, threshold, what="",
                          missing="the audit ran no confirmation (it runs by default; this run turned it off)")
        names = conf.get("confirmed_clusters") or []
        listed = f" ({', '.join(names)})" if names else ""
        return _judge(key, "run", float(conf.get("confirmed", 0)), threshold,
                      what=f"the number of confirmed shortcuts among {len(conf.get('tested', []))} tested cluster(s)"
                           f"{listed}", detail={"clusters": names})
    if key == "max_background_swap_drop":
        swap = summary.get("background_swap")
        if not swap:
            return _judge(key, "run", None, threshold, what="",
                          missing="the audit ran no background swap (it needs images with masks or boxes)")
        return _judge(key, "run", -float(swap["accuracy_change"]), threshold,
                      what="the accuracy lost when backgrounds are swapped")
    raise AssertionError(key)


def evaluate_policy(policy: Policy, summary: dict, *, labels: list[str]) -> PolicyResult:
    """Every threshold against an audit summary; ``labels`` are the model's class labels."""
    unknown = [c for c in policy.classes if c not in labels]
    if unknown:
        raise SpecError(
            f"{_where(policy.path)} has thresholds for class(es) {', '.join(map(repr, unknown))}, which the model "
            f"does not have; its classes are {', '.join(map(repr, labels[:12]))}"
        )
    checks: list[Check] = []
    for key in RUN_THRESHOLDS:
        if key in policy.thresholds:
            checks.append(_run_check(key, summary, policy.thresholds[key]))
        elif key == "max_confirmed_shortcuts" and summary.get("confirmation"):
            check = _run_check(key, summary, DEFAULT_MAX_CONFIRMED_SHORTCUTS)
            checks.append(replace(check, sentence=check.sentence.replace(
                "the policy allows", "the policy does not set it, so the default allows"),
                detail={**check.detail, "default": True}))
    per_class = summary.get("per_class", {})
    for label in labels:
        if label not in per_class:
            continue
        for key in CLASS_THRESHOLDS:
            threshold = policy.classes.get(label, {}).get(key, policy.thresholds.get(key))
            if threshold is not None:
                checks.append(_class_check(key, label, per_class[label], threshold))
    if not checks:
        raise SpecError(f"{_where(policy.path)}: none of its thresholds applies to this audit's classes")
    return PolicyResult(policy=policy, checks=tuple(checks))
