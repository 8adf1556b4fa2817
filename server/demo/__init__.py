"""The demo scenario (invented data, demo only): glazed wall tiles with a planted corner-tag shortcut.

- :mod:`pellucid.demo.tiles` — the deterministic tile generator, its splits and a folder writer;
- :mod:`pellucid.demo.net` — TileNet, the tiny CNN (``build_tilenet``, the spec's factory);
- :mod:`pellucid.demo.train` — the deterministic CPU rebuild of ``demo_models/tilenet*``.

Submodules are imported on demand so that importing the package stays cheap.
"""
