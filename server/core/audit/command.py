"""The ``pellucid audit`` command line that re-runs an audit, built in one place.

The command line stores it with a run it starts; the dashboard builds the same line for the runs it
starts (with the data folder as ``--store`` and its stored policy and patch files), so every run
shows a command a reviewer can paste. Paths are given as the caller resolved them.
"""

from __future__ import annotations

import shlex
from collections.abc import Iterable

__all__ = ["audit_command", "param_items"]


def param_items(params: dict) -> list[str]:
    """A method's parameters as the command line's ``KEY=VALUE`` items (booleans as true/false)."""
    out = []
    for key, value in params.items():
        text = ("true" if value else "false") if isinstance(value, bool) else str(value)
        out.append(f"{key}={text}")
    return out


def audit_command(
    *,
    model: str,
    images: str,
    out: str,
    method: str,
    target: str,
    policy: str | None = None,
    params: Iterable[str] = (),
    store: str | None = None,
    inject_patch: str | None = None,
    inject_from: str | None = None,
    inject_box: str | None = None,
    inject_at: str | None = None,
    inject_class: str | None = None,
    inject_limit: int | None = None,
    inject_seed: int = 0,
    gallery_layer: str | None = None,
    gallery_top: int = 8,
    background_swap: bool = False,
    channel_layer: str | None = None,
    discovery: bool = True,
    confirmation: bool = True,
    shard_size: int = 8,
    threads: int = 1,
) -> str:
    """One shell-quoted line; options left at their defaults are left out."""
    parts = ["pellucid", "audit", "--model", model, "--images", images, "--out", out]
    if policy:
        parts += ["--policy", policy]
    parts += ["--method", method]
    for p in params:
        parts += ["--param", p]
    parts += ["--target", target]
    if store:
        parts += ["--store", store]
    for flag, value in (("--inject-patch", inject_patch), ("--inject-from", inject_from),
                        ("--inject-box", inject_box), ("--inject-at", inject_at), ("--inject-class", inject_class),
                        ("--inject-limit", inject_limit), ("--gallery-layer", gallery_layer)):
        if value is not None:
            parts += [flag, str(value)]
    if inject_seed:
        parts += ["--inject-seed", str(inject_seed)]
    if gallery_layer:
        parts += ["--gallery-top", str(gallery_top)]
    if background_swap:
        parts.append("--background-swap")
    if channel_layer:
        parts += ["--channel-layer", channel_layer]
    if not discovery:
        parts.append("--no-discovery")
    elif not confirmation:
        parts.append("--no-confirmation")
    if shard_size != 8:
        parts += ["--shard-size", str(shard_size)]
    if threads != 1:
        parts += ["--threads", str(threads)]
    return shlex.join(parts)
