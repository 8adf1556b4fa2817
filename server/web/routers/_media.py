"""Small helpers the routers share: PNG data URLs and JSON-friendly arrays."""

from __future__ import annotations

import base64

import numpy as np


def data_url(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def rounded_rows(values: np.ndarray, *, digits: int = 5) -> list[list[float]]:
    """(H, W) floats → nested lists with ``digits`` significant digits (keeps hover JSON small)."""
    arr = np.asarray(values, dtype=np.float64)
    out = np.where(np.isfinite(arr), arr, 0.0)
    with np.errstate(divide="ignore"):
        mag = np.where(out != 0, np.floor(np.log10(np.abs(out))), 0)
    scale = 10.0 ** (digits - 1 - mag)
    return (np.round(out * scale) / scale).tolist()
