"""What produced a result: Pellucid, Python and library versions, and the CPU.

Every result that leaves Pellucid (inspect's result.json, an audit's summary.json, a stored run,
a report) carries :func:`provenance` so a reviewer can tell whether two results are comparable:
the same fingerprint on another torch build or CPU can differ in the last bits.
"""

from __future__ import annotations

import functools
import os
import platform
import sys
from importlib import metadata
from typing import Any

__all__ = ["provenance", "provenance_line"]

_LIBRARIES = ("torch", "torchvision", "numpy")


def _version(dist: str) -> str | None:
    try:
        return metadata.version(dist)
    except metadata.PackageNotFoundError:
        return None


def _cpu() -> str:
    """The CPU model name (Linux /proc/cpuinfo, else the platform's word for it)."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                if line.lower().startswith(("model name", "hardware", "cpu model")):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown"


@functools.lru_cache(maxsize=1)
def _static() -> dict[str, Any]:
    from pellucid import __version__

    return {
        "pellucid": __version__,
        "python": platform.python_version(),
        **{lib: _version(lib) for lib in _LIBRARIES},
        "platform": f"{platform.system()} {platform.release()} {platform.machine()}",
        "cpu": _cpu(),
        "cpu_count": os.cpu_count(),
    }


def provenance() -> dict[str, Any]:
    """Versions of Pellucid, Python, torch, torchvision and numpy, the platform, the CPU and torch's threads.

    Versions come from the installed distributions' metadata, so nothing heavy is imported;
    ``torch_threads`` is filled in only when torch is already imported.
    """
    out = dict(_static())
    torch = sys.modules.get("torch")
    out["torch_threads"] = torch.get_num_threads() if torch is not None else None
    return out


def provenance_line(p: dict[str, Any] | None = None) -> str:
    """One line for a report footer: 'Pellucid 0.1.0 · Python 3.11.7 · torch 2.14.1 · … · CPU …'."""
    p = p or provenance()
    parts = [f"Pellucid {p.get('pellucid')}", f"Python {p.get('python')}"]
    parts += [f"{lib} {p.get(lib)}" for lib in _LIBRARIES if p.get(lib)]
    parts.append(f"CPU {p.get('cpu')}")
    return " · ".join(parts)
