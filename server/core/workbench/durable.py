"""The dashboard's images and the attribution maps made from them, kept in the audit store.

An image a user uploads (or opens from a folder) and every map computed for it outlive the
server process: they live in the same data folder as the audit runs (``--store``), in two tables
of the same SQLite file and as artefacts named by the sha256 of their bytes::

    images  sha256 · name · info (size, mode, format, intake notes) · bytes · thumbnail · created · used
    maps    id · image · model name and fingerprint · method · record (target, parameters, counts,
            extras) · map (.npy) · the input as the model saw it (.png) · thumbnail · checks

A map's id is derived from what produced it (model fingerprint, image, method, parameters,
target), so asking for the same map again finds the stored one. The faithfulness score and the
weight-randomisation check of a map are kept with it (``checks``). Forgetting an image forgets its
maps; artefacts nothing names any more are removed (``Store.delete_rows``).
"""

from __future__ import annotations

import io
import json
import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from PIL import Image

from pellucid.core.attribution.result import AttributionMap
from pellucid.core.audit.store import Store
from pellucid.core.errors import NotFoundError
from pellucid.core.model.preprocess import IntakeImage
from pellucid.core.views import render

__all__ = ["THUMBNAIL_SIDE", "StoredImage", "StoredMap", "Workbench", "overlay_thumbnail", "png_of"]

THUMBNAIL_SIDE = 96
CHECK_KINDS = ("faithfulness", "sanity")
# Seconds an unnamed artefact is spared when an image is forgotten: an audit may have just written
# a map's array for a result it has not stored yet.
_SWEEP_GRACE = 300.0


def png_of(pixels: np.ndarray) -> bytes:
    """(H, W, 3) or (H, W) uint8 → PNG bytes."""
    return render.encode_png(np.ascontiguousarray(pixels))


def _thumbnail(pil: Image.Image) -> bytes:
    small = pil.convert("RGB")
    small.thumbnail((THUMBNAIL_SIDE, THUMBNAIL_SIDE))
    return png_of(np.asarray(small))


def overlay_thumbnail(display: np.ndarray, values: np.ndarray, *, cmap: str, vmin: float,
                      vmax: float) -> np.ndarray:
    """(H, W, 3) uint8 input and (H, W) map → a small (h, w, 3) uint8 overlay for lists of maps.

    Tiny inputs (32 px) are scaled up by whole pixels so that a thumbnail can be seen."""
    picture = render.overlay(display, values, alpha=0.6, cmap=cmap, vmin=vmin, vmax=vmax)
    small = Image.fromarray(picture)
    small.thumbnail((THUMBNAIL_SIDE, THUMBNAIL_SIDE), Image.Resampling.NEAREST)
    if max(small.size) < 64:
        k = -(-64 // max(small.size))
        small = small.resize((small.width * k, small.height * k), Image.Resampling.NEAREST)
    return np.asarray(small)


def _plain(value: Any) -> Any:
    """``value`` if it survives JSON unchanged in kind (numbers finite or not, text, lists, dicts), else None."""
    if isinstance(value, (np.generic,)):
        value = value.item()
    if value is None or isinstance(value, (str, bool, int)):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    return None


@dataclass(frozen=True)
class StoredImage:
    sha256: str
    name: str
    original_size: tuple[int, int]
    original_mode: str
    format: str | None
    notes: list[str]
    created: float
    used: float
    thumb_hash: str | None


@dataclass(frozen=True)
class StoredMap:
    """One stored map's record; the arrays come from :meth:`Workbench.arrays`."""

    id: str
    image: str
    image_name: str
    model_name: str
    model_fingerprint: str
    method: str
    title: str
    target: int
    target_label: str
    target_source: str
    signed: bool
    params: dict
    seconds: float
    n_forwards: int
    n_backwards: int
    extras: dict
    map_hash: str
    display_hash: str
    thumb_hash: str | None
    checks: dict = field(default_factory=dict)
    created: float = 0.0

    def attribution_map(self, values: np.ndarray) -> AttributionMap:
        """The core's map object again, with the stored values."""
        return AttributionMap(map=values, signed=self.signed, method=self.method, target=self.target,
                              target_source=self.target_source, params=dict(self.params), seconds=self.seconds,
                              n_forwards=self.n_forwards, n_backwards=self.n_backwards, extras=dict(self.extras))

    def summary(self) -> dict:
        """JSON-able, without arrays (lists of maps, links)."""
        return {"id": self.id, "image": self.image, "image_name": self.image_name, "model": self.model_name,
                "fingerprint": self.model_fingerprint, "method": self.method, "title": self.title,
                "target": self.target, "target_label": self.target_label, "target_source": self.target_source,
                "signed": self.signed, "params": dict(self.params), "engine": self.extras.get("engine"),
                "warning": self.extras.get("warning"), "seconds": self.seconds, "created": self.created,
                "checks": sorted(k for k, v in self.checks.items() if v is not None)}


def _image_row(row: Any) -> StoredImage:
    info = json.loads(row["info"])
    return StoredImage(sha256=row["sha256"], name=row["name"], original_size=tuple(info["original_size"]),
                       original_mode=info["original_mode"], format=info.get("format"), notes=list(info["notes"]),
                       created=row["created"], used=row["used"], thumb_hash=row["thumb_hash"])


def _map_row(row: Any) -> StoredMap:
    rec = json.loads(row["record"])
    return StoredMap(id=row["id"], image=row["image"], image_name=row["image_name"], model_name=row["model_name"],
                     model_fingerprint=row["model_fingerprint"], method=row["method"], title=rec["title"],
                     target=int(rec["target"]), target_label=rec["target_label"],
                     target_source=rec["target_source"], signed=bool(rec["signed"]), params=rec["params"],
                     seconds=float(rec["seconds"]), n_forwards=int(rec["n_forwards"]),
                     n_backwards=int(rec["n_backwards"]), extras=rec.get("extras") or {}, map_hash=row["map_hash"],
                     display_hash=row["display_hash"], thumb_hash=row["thumb_hash"],
                     checks=json.loads(row["checks"]) if row["checks"] else {}, created=row["created"])


_MAP_SELECT = ("SELECT maps.*, images.name AS image_name FROM maps JOIN images ON images.sha256 = maps.image")


class Workbench:
    """Images and maps in ``store`` (thread-safe through the store's one connection and lock)."""

    def __init__(self, store: Store) -> None:
        self.store = store

    # -- images ---------------------------------------------------------------------------------

    def put_image(self, data: bytes, image: IntakeImage) -> StoredImage:
        """Keep an image's file bytes (its id is their sha256) and a thumbnail; a second put renames and touches it."""
        info = json.dumps({"original_size": list(image.original_size), "original_mode": image.original_mode,
                           "format": image.format, "notes": list(image.notes)})
        now = time.time()
        with self.store.lock:
            digest = self.store.put_bytes(bytes(data), "img")
            if digest != image.sha256:
                raise ValueError(f"image {image.name!r}: its sha256 {image.sha256[:12]} is not that of the bytes given")
            thumb = self.store.put_bytes(_thumbnail(image.pil), "png")
            self.store.write(lambda db: db.execute(
                "INSERT INTO images (sha256, name, info, bytes_hash, thumb_hash, created, used) VALUES "
                "(?, ?, ?, ?, ?, ?, ?) ON CONFLICT (sha256) DO UPDATE SET name=excluded.name, used=excluded.used",
                (digest, image.name, info, digest, thumb, now, now)))
        found = self.image(digest)
        assert found is not None
        return found

    def image(self, sha256: str) -> StoredImage | None:
        rows = self.store.read("SELECT * FROM images WHERE sha256=?", (sha256,))
        return _image_row(rows[0]) if rows else None

    def image_bytes(self, sha256: str) -> bytes:
        found = self.image(sha256)
        if found is None:
            raise NotFoundError(f"no image with id {sha256[:16]!r} in the store")
        return self.store.get_bytes(found.sha256)

    def thumbnail(self, image: StoredImage) -> bytes | None:
        return self.store.get_bytes(image.thumb_hash) if image.thumb_hash else None

    def touch(self, sha256: str) -> None:
        self.store.write(lambda db: db.execute("UPDATE images SET used=? WHERE sha256=?", (time.time(), sha256)))

    def recent_images(self, *, limit: int = 48) -> list[StoredImage]:
        """Most recently used first."""
        rows = self.store.read("SELECT * FROM images ORDER BY used DESC, created DESC LIMIT ?", (int(limit),))
        return [_image_row(r) for r in rows]

    def count_images(self) -> int:
        return int(self.store.read("SELECT COUNT(*) AS n FROM images")[0]["n"])

    def forget_image(self, sha256: str) -> int:
        """Remove an image and its maps; returns the artefact files removed."""
        if self.image(sha256) is None:
            raise NotFoundError(f"no image with id {sha256[:16]!r} in the store")

        def drop(db: Any) -> list[str]:
            named = [h for row in db.execute("SELECT bytes_hash, thumb_hash FROM images WHERE sha256=?", (sha256,))
                     for h in row if h]
            named += [h for row in db.execute("SELECT map_hash, display_hash, thumb_hash FROM maps WHERE image=?",
                                              (sha256,)) for h in row if h]
            db.execute("DELETE FROM maps WHERE image=?", (sha256,))
            db.execute("DELETE FROM images WHERE sha256=?", (sha256,))
            return named

        with self.store.lock:
            return self.store.delete_rows(drop, grace_seconds=_SWEEP_GRACE)

    # -- maps -----------------------------------------------------------------------------------

    def put_map(self, *, map_id: str, image: str, model_name: str, model_fingerprint: str, title: str,
                target_label: str, amap: AttributionMap, display: np.ndarray,
                thumbnail: np.ndarray | None = None) -> StoredMap:
        """Keep a finished map (``amap.map`` (H, W) float32) with the (H, W, 3) input the model saw."""
        if self.image(image) is None:
            raise NotFoundError(f"no image with id {image[:16]!r} in the store; keep the image before its maps")
        record = {"title": title, "target": int(amap.target), "target_label": target_label,
                  "target_source": amap.target_source, "signed": bool(amap.signed), "params": _plain(amap.params),
                  "seconds": float(amap.seconds), "n_forwards": int(amap.n_forwards),
                  "n_backwards": int(amap.n_backwards),
                  "extras": {k: v for k, v in (_plain(amap.extras) or {}).items() if v is not None}}
        with self.store.lock:
            map_hash = self.store.put_array(np.asarray(amap.map, dtype=np.float32))
            display_hash = self.store.put_bytes(png_of(display), "png")
            thumb_hash = self.store.put_bytes(png_of(thumbnail), "png") if thumbnail is not None else None
            self.store.write(lambda db: db.execute(
                "INSERT OR REPLACE INTO maps (id, image, model_name, model_fingerprint, method, record, map_hash, "
                "display_hash, thumb_hash, checks, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, "
                "(SELECT checks FROM maps WHERE id=?), ?)",
                (map_id, image, model_name, model_fingerprint, amap.method, json.dumps(record, allow_nan=False),
                 map_hash, display_hash, thumb_hash, map_id, time.time())))
        found = self.get_map(map_id)
        assert found is not None
        return found

    def get_map(self, map_id: str) -> StoredMap | None:
        rows = self.store.read(f"{_MAP_SELECT} WHERE maps.id=?", (map_id,))
        return _map_row(rows[0]) if rows else None

    def arrays(self, stored: StoredMap) -> tuple[np.ndarray, np.ndarray]:
        """The map's values (H, W) float32 and the input as the model saw it (H, W, 3) uint8."""
        values = self.store.get_array(stored.map_hash)
        display = np.asarray(Image.open(io.BytesIO(self.store.get_bytes(stored.display_hash))).convert("RGB"))
        return values, display

    def map_thumbnail(self, stored: StoredMap) -> bytes | None:
        return self.store.get_bytes(stored.thumb_hash) if stored.thumb_hash else None

    def maps_for(self, image: str, *, model_fingerprint: str | None = None, limit: int = 200) -> list[StoredMap]:
        """Maps of one image (of one model when a fingerprint is given), oldest first."""
        if model_fingerprint is None:
            rows = self.store.read(f"{_MAP_SELECT} WHERE maps.image=? ORDER BY maps.created LIMIT ?",
                                   (image, int(limit)))
        else:
            rows = self.store.read(f"{_MAP_SELECT} WHERE maps.image=? AND maps.model_fingerprint=? "
                                   "ORDER BY maps.created LIMIT ?", (image, model_fingerprint, int(limit)))
        return [_map_row(r) for r in rows]

    def set_check(self, map_id: str, kind: str, value: dict) -> StoredMap:
        """Keep a follow-up result (faithfulness or sanity) with its map."""
        if kind not in CHECK_KINDS:
            raise ValueError(f"check kind must be one of {CHECK_KINDS}, got {kind!r}")
        text = json.dumps(_plain(value), allow_nan=False)

        def save(db: Any) -> None:
            row = db.execute("SELECT checks FROM maps WHERE id=?", (map_id,)).fetchone()
            if row is None:
                raise NotFoundError(f"no map with id {map_id[:24]!r} in the store")
            checks = json.loads(row["checks"]) if row["checks"] else {}
            checks[kind] = json.loads(text)
            db.execute("UPDATE maps SET checks=? WHERE id=?", (json.dumps(checks), map_id))

        self.store.write(save)
        found = self.get_map(map_id)
        assert found is not None
        return found
