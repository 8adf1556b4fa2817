"""One confinement rule for every file a request may make Pellucid read.

A path is inside a root when its fully resolved form (every symbolic link followed, ``..``
collapsed) is the root itself or lies below it. The rule is applied to what the operating
system would open, not to the text that was given, so a symlinked folder, a ``../`` in a
manifest or an absolute path cannot lead a reader out of its root.

Two entry points:

- :func:`resolve_inside` for a *relative* path typed by a client (folder browsing, samples,
  a run's image): it refuses absolute paths, ``..`` and NUL characters with a plain sentence
  before it touches the disk, then applies the rule.
- :func:`is_inside` for a path already known (an audit's manifest rows, class folders): a plain
  yes or no, so the caller decides whether to skip the file or refuse the request.
"""

from __future__ import annotations

from pathlib import Path

from pellucid.core.errors import BadParameterError, NotFoundError

__all__ = ["is_inside", "resolve_inside"]


def is_inside(root: str | Path, path: str | Path) -> bool:
    """True when ``path`` resolves to ``root`` or below it (both resolved, symlinks followed)."""
    try:
        base = Path(root).resolve()
        real = Path(path).resolve()
    except (OSError, RuntimeError, ValueError):  # a symlink loop, a NUL byte: not inside anything
        return False
    return real == base or base in real.parents


def resolve_inside(root: str | Path, relative: str, *, what: str = "the image folder") -> Path:
    """``relative`` resolved under ``root``, refusing anything that would leave it.

    Refuses absolute paths, ``..`` parts, NUL characters, and symlinks (anywhere on the way)
    that resolve outside the root. Raises BadParameterError with a plain message; NotFoundError
    when nothing is there. ``what`` names the root in messages.
    """
    rel = (relative or "").replace("\\", "/").strip()
    if "\x00" in rel:
        raise BadParameterError("paths cannot contain NUL characters")
    if rel.startswith("/") or (len(rel) > 1 and rel[1] == ":"):
        raise BadParameterError(f"paths are relative to {what}; received the absolute path {relative!r}")
    parts = [p for p in rel.split("/") if p not in ("", ".")]
    if any(p == ".." for p in parts):
        raise BadParameterError(f"'..' is not allowed in paths (received {relative!r}); reading stays inside {what}")
    base = Path(root).resolve()
    target = base.joinpath(*parts)
    if not is_inside(base, target):
        raise BadParameterError(f"{relative!r} leads outside {what} (through a symbolic link); it is refused")
    resolved = target.resolve()
    if not resolved.exists():
        raise NotFoundError(f"nothing called {relative!r} in {what}")
    return resolved
