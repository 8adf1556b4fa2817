"""Which stored audit runs this server may read files for and show pictures of, and its demo folders.

A server reads image files from two places only: the folder given with ``--images`` and the demo
tile folders it generates itself inside the store (``STORE/demo-tiles``). Every stored run
records ``allowed_root``, the folder all of its images lie in (``core/audit/dataset.py``). The
server shows a run's pictures (flagged images, overlays, injection examples, galleries, reports)
and resumes it only when that folder lies inside one of its own readable places, by the rule of
``core/confine.py``. A run audited from the command line into the same store from elsewhere keeps
its numbers visible, but not its pictures.

Demo tile folders are generated from (split, tiles per class, seed) and are therefore
disposable: at most ``MAX_DEMO_FOLDERS`` are kept (least recently used removed first) and one
is generated again, identically, when a run needs it back.
"""

from __future__ import annotations

import os
import re
import shutil
import threading
import time
from pathlib import Path
from typing import Any

from fastapi import HTTPException

from pellucid.core.confine import is_inside
from pellucid.core.errors import ConflictError
from pellucid.web.settings import Settings

__all__ = ["MAX_DEMO_FOLDERS", "RunClaims", "demo_folder", "pictures_refusal", "readable_roots",
           "require_pictures", "restore_demo_folder"]

DEMO_DIR = "demo-tiles"
MAX_DEMO_FOLDERS = 6
_DEMO_NAME = re.compile(r"^(clean|train|untainted)-(\d{1,3})-(\d{1,10})$")
_DEMO_LOCK = threading.Lock()


def readable_roots(settings: Settings) -> list[Path]:
    roots = [Path(settings.data_dir) / DEMO_DIR]
    if settings.image_root is not None:
        roots.append(Path(settings.image_root))
    return roots


def pictures_refusal(run: Any, settings: Settings) -> str | None:
    """Why this server may not read or show ``run``'s images, or None when it may."""
    allowed = (run.dataset or {}).get("allowed_root")
    if not allowed:
        return (f"run {run.id} read images from outside its own folder (or was stored before Pellucid recorded "
                "that folder), so this server does not show its pictures; read them with 'pellucid report' on the "
                "machine that ran it")
    if not any(is_inside(root, allowed) for root in readable_roots(settings)):
        return (f"run {run.id} audited a folder outside this server's image folder (it was started elsewhere, e.g. "
                "from the command line), so this server does not show its pictures or resume it; start the server "
                "with --images pointing at a folder that contains it, or use 'pellucid report'")
    return None


def require_pictures(run: Any, settings: Settings) -> None:
    refusal = pictures_refusal(run, settings)
    if refusal is not None:
        raise HTTPException(status_code=403, detail=refusal)


def _touch(folder: Path) -> None:
    now = time.time()
    try:
        os.utime(folder, (now, now))
    except OSError:
        pass


def _prune(parent: Path, keep: Path, in_use: set[Path]) -> None:
    folders = sorted((p for p in parent.iterdir() if p.is_dir() and _DEMO_NAME.match(p.name)),
                     key=lambda p: p.stat().st_mtime, reverse=True)
    for old in folders[MAX_DEMO_FOLDERS:]:
        if old != keep and old.resolve() not in in_use:
            shutil.rmtree(old, ignore_errors=True)


def demo_folder(settings: Settings, *, split: str, per_class: int, seed: int,
                in_use: set[Path] | None = None) -> Path:
    """The demo tile folder for (split, per_class, seed), generated when missing; old ones pruned."""
    from pellucid.demo.tiles import make_split, write_folder

    parent = Path(settings.data_dir) / DEMO_DIR
    folder = parent / f"{split}-{per_class}-{seed}"
    with _DEMO_LOCK:
        if not (folder / "manifest.csv").is_file():
            parent.mkdir(parents=True, exist_ok=True)
            shutil.rmtree(folder, ignore_errors=True)
            write_folder(make_split(split, per_class=per_class, seed=seed), folder)
        _touch(folder)
        _prune(parent, folder, {p.resolve() for p in (in_use or set())})
    return folder


def restore_demo_folder(settings: Settings, root: str | Path, *, in_use: set[Path] | None = None) -> bool:
    """Generate a pruned demo folder of a stored run again; True when ``root`` is one and now exists."""
    root = Path(root)
    parent = Path(settings.data_dir) / DEMO_DIR
    match = _DEMO_NAME.match(root.name)
    if match is None or not is_inside(parent, root) or root.resolve().parent != parent.resolve():
        return False
    demo_folder(settings, split=match[1], per_class=int(match[2]), seed=int(match[3]), in_use=in_use)
    return True


class RunClaims:
    """Runs this server is resuming or running now: a second resume of one of them is a conflict."""

    def __init__(self) -> None:
        self._claimed: set[str] = set()
        self._lock = threading.Lock()

    def claim(self, run_id: str) -> None:
        with self._lock:
            if run_id in self._claimed:
                raise ConflictError(f"run {run_id} is already being resumed; follow its job instead of resuming again")
            self._claimed.add(run_id)

    def release(self, run_id: str | None) -> None:
        if run_id is None:
            return
        with self._lock:
            self._claimed.discard(run_id)
