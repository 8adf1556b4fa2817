"""Saved policies and suspect patches, as plain files in the data folder (``--store``)::

    DATA/policies/NAME.toml   a policy, readable by ``pellucid audit --policy`` as it lies
    DATA/patches/ID.png       a suspect patch (RGB PNG; ID = the first 16 hex digits of its sha256)

Files rather than store rows: a saved policy is the very file the command line takes, and a
saved policy names its patch as ``../patches/ID.png``, relative to itself, as hand-written policies
do. Patches are not store artefacts, because deleting a run sweeps every artefact no run names.

Every policy is checked by :func:`~pellucid.core.audit.policy.parse_policy` before it is written
and read back with :func:`~pellucid.core.audit.policy.load_policy` after, so the library never
holds a file the command line would refuse.
"""

from __future__ import annotations

import hashlib
import os
import re
import tempfile
from dataclasses import dataclass
from pathlib import Path

from pellucid.core.audit.policy import Policy, load_policy, parse_policy
from pellucid.core.audit.policy_toml import policy_toml
from pellucid.core.errors import BadParameterError, ConflictError, NotFoundError, PellucidError

__all__ = ["MAX_PATCH_SIDE", "PatchInfo", "PolicyEntry", "PolicyLibrary"]

# A patch is pasted into the model's input; larger than this is no patch (our own limit).
MAX_PATCH_SIDE = 512
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_-]{0,63}")
_PATCH_ID = re.compile(r"[0-9a-f]{16}")


@dataclass(frozen=True)
class PatchInfo:
    id: str
    path: Path
    width: int
    height: int

    def to_dict(self) -> dict:
        return {"id": self.id, "width": self.width, "height": self.height}


@dataclass(frozen=True)
class PolicyEntry:
    name: str
    origin: str  # "saved" (in the data folder) or "bundled" (shipped with Pellucid)
    path: Path


def _atomic_write(path: Path, data: bytes) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


class PolicyLibrary:
    """Policies saved in ``root``/policies and patches in ``root``/patches, beside the bundled policies."""

    def __init__(self, root: str | Path, *, bundled: dict[str, Path] | None = None) -> None:
        self.root = Path(root)
        self.policy_dir = self.root / "policies"
        self.patch_dir = self.root / "patches"
        self.bundled = dict(bundled or {})

    # -- policies -------------------------------------------------------------------------------

    def entries(self) -> list[PolicyEntry]:
        """Bundled policies first, then the saved ones, each in name order."""
        saved = sorted(self.policy_dir.glob("*.toml")) if self.policy_dir.is_dir() else []
        return ([PolicyEntry(n, "bundled", p) for n, p in sorted(self.bundled.items())]
                + [PolicyEntry(p.stem, "saved", p) for p in saved if _NAME.fullmatch(p.stem)])

    def entry(self, name: str) -> PolicyEntry:
        for e in self.entries():
            if e.name == name:
                return e
        known = ", ".join(e.name for e in self.entries()) or "none"
        raise NotFoundError(f"no policy named {name!r}; policies: {known}")

    def load(self, name: str) -> Policy:
        return load_policy(self.entry(name).path)

    @staticmethod
    def check_name(name: str) -> str:
        if not _NAME.fullmatch(name or ""):
            raise BadParameterError(
                f"a policy name is 1 to 64 letters, digits, '-' or '_', starting with a letter or digit; "
                f"received {name!r}")
        return name

    def validate(self, data: dict, *, patch_id: str | None = None) -> Policy:
        """A policy from its TOML-shaped table, checked by the parser ``pellucid audit --policy`` uses.

        ``patch_id`` names a stored patch for the ``[injection]`` table (its ``patch`` key is then set).
        """
        data = {k: (dict(v) if isinstance(v, dict) else v) for k, v in data.items()}
        if "injection" in data and isinstance(data["injection"], dict):
            if patch_id is None:
                raise BadParameterError("the injection test needs a suspect patch: upload one or pick a stored one")
            data["injection"]["patch"] = str(self.patch(patch_id).path)
        policy = parse_policy(data)
        if policy.method is not None:  # the audit validates them so when it takes the policy's method
            from pellucid.core.attribution import get_method

            get_method(policy.method).schema.validate(policy.params, method=policy.method)
        return policy

    def save(self, name: str, data: dict, *, patch_id: str | None = None, replace: bool = True) -> Policy:
        """Check and write ``DATA/policies/NAME.toml``; returns the policy as read back from the file."""
        self.check_name(name)
        if name in self.bundled:
            raise ConflictError(f"{name!r} is the name of a bundled policy; save under another name")
        target = self.policy_dir / f"{name}.toml"
        if target.exists() and not replace:
            raise ConflictError(f"a policy named {name!r} is already saved; choose another name or replace it")
        policy = self.validate(data, patch_id=patch_id)
        text = policy_toml(policy, patch=f"../patches/{patch_id}.png" if policy.injection else None)
        _atomic_write(target, text.encode("utf-8"))
        return load_policy(target)

    def delete(self, name: str) -> None:
        entry = self.entry(name)
        if entry.origin != "saved":
            raise ConflictError(f"{name!r} is a bundled policy and cannot be deleted")
        entry.path.unlink(missing_ok=True)

    def download(self, name: str) -> str:
        """The policy as TOML text for use anywhere on this machine: its patch named by absolute path."""
        policy = self.load(name)
        return policy_toml(policy, patch=str(policy.injection.patch.resolve()) if policy.injection else None)

    # -- patches --------------------------------------------------------------------------------

    def put_patch(self, data: bytes, *, name: str = "patch", max_bytes: int | None = None) -> PatchInfo:
        """Decode a picture (any format the image intake reads), keep it as an RGB PNG, return its id."""
        import numpy as np

        from pellucid.core.model.preprocess import read_image
        from pellucid.core.views.render import encode_png

        image = read_image(data, name=name, **({"max_bytes": max_bytes} if max_bytes else {}))
        rgb = np.asarray(image.pil.convert("RGB"), dtype=np.uint8)
        h, w = rgb.shape[:2]
        if h > MAX_PATCH_SIDE or w > MAX_PATCH_SIDE:
            raise BadParameterError(
                f"the patch {name!r} is {w}×{h} px; a suspect patch is pasted into the model's input, so it may be "
                f"at most {MAX_PATCH_SIDE} px a side: crop it to the mark itself")
        png = encode_png(rgb)
        pid = hashlib.sha256(png).hexdigest()[:16]
        path = self.patch_dir / f"{pid}.png"
        if not path.is_file():
            _atomic_write(path, png)
        return PatchInfo(pid, path, w, h)

    def patch(self, patch_id: str) -> PatchInfo:
        if not isinstance(patch_id, str) or not _PATCH_ID.fullmatch(patch_id):
            raise BadParameterError(f"a patch id is 16 hexadecimal digits; received {patch_id!r}")
        path = self.patch_dir / f"{patch_id}.png"
        if not path.is_file():
            raise NotFoundError(f"no stored patch {patch_id!r}; upload the patch again")
        from PIL import Image

        with Image.open(path) as im:
            w, h = im.size
        return PatchInfo(patch_id, path, w, h)

    def patches(self) -> list[PatchInfo]:
        found = sorted(self.patch_dir.glob("*.png"), key=lambda p: p.stat().st_mtime, reverse=True) \
            if self.patch_dir.is_dir() else []
        out = []
        for p in found:
            if _PATCH_ID.fullmatch(p.stem):
                try:
                    out.append(self.patch(p.stem))
                except (PellucidError, OSError):
                    continue
        return out

    def adopt_patch(self, path: Path) -> PatchInfo:
        """A policy's patch file (bundled or hand-written) copied into the library, so the editor can use it."""
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise NotFoundError(f"the policy's patch {str(path)!r} cannot be read: {exc.strerror or exc}") from None
        return self.put_patch(data, name=path.name)
