"""A policy written back as TOML text that :func:`~pellucid.core.audit.policy.load_policy` reads.

The dashboard's policy editor saves and downloads policies through this module; ``pellucid audit
--policy FILE`` reads the file with the same parser as a hand-written one. Python's ``tomllib``
only reads TOML, and the values a policy holds are few (text, numbers, booleans, a pair of whole
numbers, one inline table of plain values), so they are written here rather than with another
dependency. Each threshold carries its meaning as a comment, so the file explains itself to a
reviewer.
"""

from __future__ import annotations

import json
import math
import re

from pellucid.core.audit.policy import CLASS_THRESHOLDS, THRESHOLDS, Policy

__all__ = ["policy_toml"]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _text(value: str) -> str:
    # A TOML basic string: JSON's escapes are TOML's too, except DEL, which TOML wants escaped.
    return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")


def _key(key: str) -> str:
    return key if _BARE_KEY.fullmatch(key) else _text(key)


def _value(value: object) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return _text(value)
    raise TypeError(f"a policy value must be text, a number or a boolean; received {value!r}")


def _threshold(key: str, value: float) -> str:
    # Counts read better as whole numbers; the parser accepts either.
    return str(int(value)) if THRESHOLDS[key][1] == "count" else repr(float(value))


def _threshold_lines(table: dict[str, float]) -> list[str]:
    return [f"{key} = {_threshold(key, table[key])}  # {THRESHOLDS[key][0]}: {THRESHOLDS[key][3]}"
            for key in THRESHOLDS if key in table]


def policy_toml(policy: Policy, *, patch: str | None = None) -> str:
    """The policy as TOML text; ``patch`` is the injection patch's path as the file should name it
    (relative to where the file will lie, or absolute). Required when the policy has an injection."""
    lines = ["# A Pellucid audit policy (pellucid audit --policy FILE). Keys: README, \"Audit policies\".",
             f"name = {_text(policy.name)}"]
    if policy.description:
        lines.append(f"description = {_text(policy.description)}")
    if policy.thresholds:
        lines += ["", "[thresholds]", *_threshold_lines(policy.thresholds)]
    for label, table in policy.classes.items():
        if table:
            lines += ["", f"[classes.{_key(label)}]",
                      *_threshold_lines({k: v for k, v in table.items() if k in CLASS_THRESHOLDS})]
    inj = policy.injection
    if inj is not None:
        if not patch:
            raise ValueError("a policy with an injection test needs the patch's path to be written")
        at = _text(inj.at) if isinstance(inj.at, str) else f"[{int(inj.at[0])}, {int(inj.at[1])}]"
        lines += ["", "[injection]", f"patch = {_text(patch)}", f"suspect_class = {_text(inj.suspect_class)}",
                  f"at = {at}"]
        if inj.at == "random":  # the parser refuses a seed with a fixed place
            lines.append(f"seed = {int(inj.seed)}")
        if inj.limit is not None:
            lines.append(f"limit = {int(inj.limit)}")
    if policy.method is not None or policy.params or policy.target is not None:
        lines += ["", "[audit]"]
        if policy.method is not None:
            lines.append(f"method = {_text(policy.method)}")
        if policy.params:
            inline = ", ".join(f"{_key(k)} = {_value(v)}" for k, v in policy.params.items())
            lines.append(f"params = {{ {inline} }}")
        if policy.target is not None:
            lines.append(f"target = {_text(policy.target)}")
    return "\n".join(lines) + "\n"
