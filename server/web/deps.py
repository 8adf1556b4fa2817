"""FastAPI dependencies: the workspace and settings of the running app."""

from __future__ import annotations

from fastapi import Request

from pellucid.web.settings import Settings
from pellucid.web.workspace import Workspace


def get_workspace(request: Request) -> Workspace:
    return request.app.state.workspace


def get_settings(request: Request) -> Settings:
    return request.app.state.settings
