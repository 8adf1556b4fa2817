"""Pellucid: see why an image classifier makes its calls.

The public surface for notebooks and scripts is :mod:`server.api`; the command line is
``pellucid`` (:mod:`server.cli`); the web app factory is :func:`server.web.app.create_app`.
"""

__version__ = "0.1.0"
