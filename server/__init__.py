"""Pellucid: see why an image classifier makes its calls.

The public surface for notebooks and scripts is :mod:`pellucid.api`; the command line is
``pellucid`` (:mod:`pellucid.cli`); the web app factory is :func:`pellucid.web.app.create_app`.
"""

__version__ = "0.1.0"
