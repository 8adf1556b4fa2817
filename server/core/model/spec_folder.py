"""A folder of model spec files that a running server may add models from (``serve --models DIR``).

The folder is chosen by whoever starts the server; a client only picks a file from the list this
module makes, by its name relative to the folder. The list holds ``*.toml`` files in the folder and
in its direct subfolders (a spec usually sits beside its weights), and only those whose real path
stays inside the folder (``core/confine.py``): a symbolic link that leads out is neither listed nor
opened, and a name with ``..`` or an absolute path is refused before the disk is touched.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from pellucid.core.confine import is_inside, resolve_inside
from pellucid.core.errors import BadParameterError, NotFoundError, PellucidError
from pellucid.core.model.spec import ModelSpec

__all__ = ["MAX_SPEC_BYTES", "SpecFile", "list_spec_files", "open_spec_file"]

# A spec is a few hundred bytes; anything far larger is not one (and is not parsed on every listing).
MAX_SPEC_BYTES = 256 * 1024
_WHAT = "the models folder"


@dataclass(frozen=True)
class SpecFile:
    """One entry of the folder: its name there, and the model it describes or why it cannot be read."""

    file: str
    path: Path
    name: str | None = None
    description: str = ""
    error: str | None = None

    def to_dict(self) -> dict:
        return {"file": self.file, "name": self.name, "description": self.description, "error": self.error}


def _candidates(root: Path) -> list[Path]:
    found = [p for p in root.glob("*.toml")] + [p for p in root.glob("*/*.toml")]
    return sorted({p for p in found if p.is_file() and is_inside(root, p)})


def _read(root: Path, path: Path) -> SpecFile:
    rel = path.relative_to(root).as_posix()
    size = path.stat().st_size
    if size > MAX_SPEC_BYTES:
        return SpecFile(rel, path, error=f"{size:,} bytes, more than a spec file can be ({MAX_SPEC_BYTES:,})")
    try:
        spec = ModelSpec.from_toml(path)
    except PellucidError as exc:  # named by its place in the folder: the server's own paths stay private
        return SpecFile(rel, path, error=str(exc).replace(str(path), rel))
    except OSError as exc:
        return SpecFile(rel, path, error=f"cannot be read ({exc.strerror or exc})")
    return SpecFile(rel, path, name=spec.name, description=spec.description)


def list_spec_files(root: Path) -> list[SpecFile]:
    """The spec files of ``root`` (and its direct subfolders), in name order, each parsed or with its error."""
    root = Path(root).resolve()
    if not root.is_dir():
        raise NotFoundError(f"the models folder {str(root)!r} is gone; restart the server with --models DIR")
    return [_read(root, p) for p in _candidates(root)]


def open_spec_file(root: Path, file: str) -> ModelSpec:
    """The spec called ``file`` in ``root`` (a name from :func:`list_spec_files`), parsed.

    Refuses absolute paths, ``..``, links leading out of the folder and names that are not a listed
    spec file, each with one sentence (BadParameterError); NotFoundError when nothing is there.
    """
    root = Path(root).resolve()
    if not (file or "").strip():
        raise BadParameterError("name a spec file from the models folder (for example 'resnet/spec.toml')")
    path = resolve_inside(root, file, what=_WHAT)
    listed = {p.resolve(): p.relative_to(root).as_posix() for p in _candidates(root)}
    if path not in listed:
        raise BadParameterError(f"{file!r} is not a spec file of the models folder (a .toml file in it or in "
                                "one of its subfolders)")
    entry = _read(root, path)
    if entry.error is not None:
        raise BadParameterError(f"{listed[path]} cannot be used: {entry.error}")
    return ModelSpec.from_toml(path)
