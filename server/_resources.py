"""Where Pellucid's own files live: pages, static files and the bundled models.

Installed from a wheel, they sit inside the package (``pellucid/templates``, ``pellucid/static``,
``pellucid/demo_models``) and are found through :mod:`importlib.resources`. In a source checkout
(and an editable install of it) they sit at the top of the repository, beside ``server/``.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

__all__ = ["RESOURCE_NAMES", "resource_dir"]

RESOURCE_NAMES = ("templates", "static", "demo_models")


def resource_dir(name: str) -> Path:
    """The folder holding one kind of Pellucid's own files (one of :data:`RESOURCE_NAMES`)."""
    assert name in RESOURCE_NAMES, name
    packaged = resources.files("pellucid") / name
    if packaged.is_dir():
        # A wheel installs the package as plain files, so the traversable is a real path.
        return Path(str(packaged))
    return Path(__file__).resolve().parent.parent / name
