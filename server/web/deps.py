"""FastAPI dependencies: the workspace and settings of the running app."""

from __future__ import annotations

from fastapi import Request

from .settings import Settings
from .workspace import Workspace


def get_workspace(request: Request) -> Workspace:
    return request.app.state.workspace


def get_settings(request: Request) -> Settings:
    return request.app.state.settings
