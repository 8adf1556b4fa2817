"""Images: upload, the stored images (recent first, with thumbnails and their maps), the browsable
image folder, the demo samples, the input as a model sees it.

Every image opened here is kept in the store (``Workspace.add_image``), so its id stays valid
across restarts; ``DELETE /api/images/{id}`` forgets it and its maps."""

from __future__ import annotations

import unicodedata
from pathlib import Path
from urllib.parse import quote

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import UploadFile

from pellucid.core.confine import is_inside
from pellucid.core.errors import BadParameterError, ImageDecodeError, ImageTooLargeError, NotFoundError
from pellucid.core.model.preprocess import IntakeImage, read_image
from pellucid.core.views import render
from pellucid.core.workbench import StoredImage
from pellucid.web.deps import get_settings, get_workspace
from pellucid.web.routers._media import data_url
from pellucid.web.schemas import (
    FolderEntry,
    FolderListing,
    ImageInfo,
    MapList,
    MapSummary,
    OpenFromFolder,
    OpenSample,
    PreparedView,
    SampleEntry,
    SampleList,
)
from pellucid.web.settings import Settings
from pellucid.web.workspace import IMAGE_SUFFIXES, Workspace, resolve_inside

router = APIRouter(prefix="/api", tags=["images"])

# Room for the multipart boundary and headers around the file itself.
_MULTIPART_SLACK = 64 * 1024
_MAX_LISTING = 500
_MAX_NAME = 120
UPLOAD_PATH = "/api/images"  # the one multipart route; the security middleware leaves its body to it


def clean_name(raw: str | None) -> str:
    """A display name from a client-given file name: the last part after '/' or '\\', without
    control characters (NUL included), at most 120 characters; 'upload' when nothing is left."""
    text = (raw or "").replace("\\", "/").rsplit("/", 1)[-1]
    text = "".join(c for c in text if unicodedata.category(c)[0] != "C").strip()
    if text in ("", ".", ".."):
        return "upload"
    if len(text) > _MAX_NAME:
        stem, dot, suffix = text.rpartition(".")
        text = (stem[: _MAX_NAME - len(suffix) - 1] + dot + suffix) if dot and len(suffix) <= 8 else text[:_MAX_NAME]
    return text


def _decode(ws: Workspace, settings: Settings, source, *, name: str | None = None) -> IntakeImage:
    with ws.decode_slots:
        return read_image(source, name=name, max_bytes=settings.max_upload_bytes, max_pixels=settings.max_pixels)


def _file_bytes(path: Path, settings: Settings) -> bytes:
    """A confined file's bytes, refused before reading when it is over the upload limit."""
    size = path.stat().st_size
    if size > settings.max_upload_bytes:
        raise _too_big(size, settings.max_upload_bytes)
    return path.read_bytes()


def _open_file(ws: Workspace, settings: Settings, path: Path) -> ImageInfo:
    data = _file_bytes(path, settings)
    img = _decode(ws, settings, data, name=path.name)
    return image_info(ws.add_image(img, data))


def image_info(img: IntakeImage | StoredImage) -> ImageInfo:
    stored = isinstance(img, StoredImage)
    return ImageInfo(
        id=img.sha256, name=img.name, original_size=list(img.original_size), original_mode=img.original_mode,
        format=img.format, notes=list(img.notes), link=f"/image?image={img.sha256}",
        thumbnail=f"/api/images/{img.sha256}/thumbnail.png", created=img.created if stored else None,
        used=img.used if stored else None,
    )


def _too_big(received: int | None, limit: int) -> ImageTooLargeError:
    what = f"{received / 1e6:.1f} MB" if received is not None else "more than the limit"
    return ImageTooLargeError(
        f"the upload is {what}, over the limit of {limit / 1e6:.1f} MB; send a smaller image "
        "(or start the server with a larger upload limit)"
    )


_UPLOAD_DOC = {
    "requestBody": {
        "required": True,
        "content": {
            "multipart/form-data": {
                "schema": {
                    "type": "object",
                    "required": ["file"],
                    "properties": {"file": {"type": "string", "format": "binary"}},
                }
            }
        },
    }
}


@router.post("/images", response_model=ImageInfo, summary="Upload an image (multipart field 'file')",
             openapi_extra=_UPLOAD_DOC)
async def upload_image(
    request: Request, ws: Workspace = Depends(get_workspace), settings: Settings = Depends(get_settings)
) -> ImageInfo:
    limit = settings.max_upload_bytes
    ctype = request.headers.get("content-type", "")
    if not ctype.startswith("multipart/form-data"):
        raise ImageDecodeError(
            f"uploads are sent as multipart/form-data with the image in a field named 'file'; received "
            f"content type {ctype or 'none'!r}"
        )
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit + _MULTIPART_SLACK:
        raise _too_big(int(declared), limit)
    # Count while reading, so a body without (or with a false) length still stops at the limit.
    body = bytearray()
    async for chunk in request.stream():
        body += chunk
        if len(body) > limit + _MULTIPART_SLACK:
            raise _too_big(None, limit)
    request._body = bytes(body)  # Starlette's form parser reads the buffered body from here
    form = await request.form(max_files=1, max_fields=8)
    try:
        upload = form.get("file")
        if not isinstance(upload, UploadFile):
            raise ImageDecodeError("the upload has no file in a field named 'file'; choose an image and send it again")
        data = await upload.read()
        name = clean_name(upload.filename)
    finally:
        await form.close()
    if len(data) > limit:
        raise _too_big(len(data), limit)
    img = await run_in_threadpool(_decode, ws, settings, data, name=name)
    stored = await run_in_threadpool(ws.add_image, img, data)
    return image_info(stored)


@router.get("/images", response_model=list[ImageInfo], summary="Stored images, most recently used first")
def list_images(limit: int = Query(48, ge=1, le=500), ws: Workspace = Depends(get_workspace)) -> list[ImageInfo]:
    return [image_info(img) for img in ws.images(limit=limit)]


@router.get("/images/{image_id}", response_model=ImageInfo, summary="What the server knows about an image")
def get_image(image_id: str, ws: Workspace = Depends(get_workspace)) -> ImageInfo:
    return image_info(ws.stored_image(image_id))


@router.delete("/images/{image_id}", summary="Forget a stored image and every map made from it")
def forget_image(image_id: str, ws: Workspace = Depends(get_workspace)) -> dict:
    stored = ws.stored_image(image_id)
    removed = ws.workbench.forget_image(stored.sha256)
    return {"deleted": stored.sha256, "files_removed": removed}


@router.get("/images/{image_id}/thumbnail.png", response_class=Response,
            responses={200: {"content": {"image/png": {}}}}, summary="A small picture of a stored image")
def image_thumbnail(image_id: str, ws: Workspace = Depends(get_workspace)) -> Response:
    stored = ws.stored_image(image_id)
    data = ws.workbench.thumbnail(stored)
    if data is None:
        raise NotFoundError(f"image {image_id[:16]!r} has no thumbnail")
    return Response(data, media_type="image/png", headers={"Cache-Control": "private, max-age=86400"})


@router.get("/images/{image_id}/maps", response_model=MapList,
            summary="The maps made for a stored image (of one model when given), oldest first")
def image_maps(image_id: str, model: str | None = Query(None), ws: Workspace = Depends(get_workspace)) -> MapList:
    stored = ws.stored_image(image_id)
    fingerprint = ws.model(model).fingerprint if model else None
    maps = ws.workbench.maps_for(stored.sha256, model_fingerprint=fingerprint)
    if model:  # the same weights may be served under two names; a map belongs to the name it was made with
        maps = [m for m in maps if m.model_name == model]
    return MapList(image=stored.sha256, model=model, maps=[map_summary(m) for m in maps])


def map_summary(m) -> MapSummary:
    d = m.summary()
    return MapSummary(**d, thumbnail=f"/api/results/{m.id}/thumbnail.png", link=map_link(m))


def map_link(m) -> str:
    """The image page with this map open: a link to send to a reviewer."""
    return f"/image?model={quote(m.model_name)}&image={m.image}&map={m.id}"


@router.get("/images/{image_id}/prepared", response_model=PreparedView,
            summary="The image exactly as a model sees it, with every conversion note")
def get_prepared(image_id: str, model: str | None = Query(None), ws: Workspace = Depends(get_workspace)
                 ) -> PreparedView:
    lm = ws.model(model)
    prep = ws.prepared(lm, image_id)
    return PreparedView(
        image=image_id, model=lm.name, png=data_url(render.encode_png(prep.display)),
        size=list(prep.display.shape[:2]), notes=list(prep.notes),
    )


def _root(settings: Settings) -> Path:
    if settings.image_root is None:
        raise NotFoundError("this server was started without an image folder; start it with --images FOLDER")
    root = Path(settings.image_root)
    if not root.is_dir():
        raise NotFoundError(f"the image folder {str(root)!r} given at start is not a folder")
    return root


@router.get("/folder", response_model=FolderListing, summary="Browse the image folder given at start")
def browse_folder(path: str = Query("", description="sub-folder, relative to the image folder"),
                  folders_only: bool = Query(False, description="list sub-folders only (choosing an audit folder)"),
                  settings: Settings = Depends(get_settings)) -> FolderListing:
    root = _root(settings)
    where = resolve_inside(root, path)
    if not where.is_dir():
        raise BadParameterError(f"{path!r} is a file, not a folder; open it with POST /api/folder/open")
    base = root.resolve()
    entries: list[FolderEntry] = []
    truncated = False
    for child in sorted(where.iterdir(), key=lambda p: (not p.is_dir(), p.name.lower())):
        if child.name.startswith("."):
            continue
        try:
            real = child.resolve()
        except OSError:
            continue
        if real != base and base not in real.parents:
            continue  # a symlink leading out of the folder is not offered
        rel = child.relative_to(where).as_posix()
        rel = f"{where.relative_to(base).as_posix()}/{rel}" if where != base else rel
        if real.is_dir():
            entries.append(FolderEntry(name=child.name, path=rel, kind="folder"))
        elif not folders_only and real.is_file() and child.suffix.lower() in IMAGE_SUFFIXES:
            entries.append(FolderEntry(name=child.name, path=rel, kind="image", size=real.stat().st_size))
        if len(entries) >= _MAX_LISTING:
            truncated = True
            break
    rel_here = "" if where == base else where.relative_to(base).as_posix()
    parent = None if where == base else ("" if where.parent == base else where.parent.relative_to(base).as_posix())
    return FolderListing(root_name=root.name, path=rel_here, parent=parent, entries=entries, truncated=truncated)


@router.post("/folder/open", response_model=ImageInfo, summary="Open an image from the image folder")
def open_from_folder(body: OpenFromFolder, ws: Workspace = Depends(get_workspace),
                     settings: Settings = Depends(get_settings)) -> ImageInfo:
    where = resolve_inside(_root(settings), body.path)
    if not where.is_file():
        raise BadParameterError(f"{body.path!r} is a folder, not an image")
    return _open_file(ws, settings, where)


def _sample_files(folder: Path) -> list[Path]:
    """Image files of a samples folder, none that a symbolic link leads out of it."""
    return sorted(p for p in folder.iterdir()
                  if p.suffix.lower() in IMAGE_SUFFIXES and is_inside(folder, p) and p.is_file())


@router.get("/samples", response_model=SampleList, summary="Demo images shipped beside a model's spec")
def list_samples(model: str | None = Query(None), ws: Workspace = Depends(get_workspace),
                 settings: Settings = Depends(get_settings)) -> SampleList:
    name = model or ws.default_model
    folder = ws.samples_dir(name)
    samples = []
    for path in (_sample_files(folder) if folder else [])[:48]:
        try:
            img = _decode(ws, settings, path)
        except ImageDecodeError:
            continue
        thumb = img.pil.convert("RGB")
        thumb.thumbnail((96, 96))
        samples.append(SampleEntry(name=path.name, thumbnail=data_url(render.encode_png(np.asarray(thumb)))))
    return SampleList(model=name, samples=samples)


@router.post("/samples/open", response_model=ImageInfo, summary="Open one of a model's demo images")
def open_sample(body: OpenSample, ws: Workspace = Depends(get_workspace),
                settings: Settings = Depends(get_settings)) -> ImageInfo:
    folder = ws.samples_dir(body.model)
    if folder is None:
        raise NotFoundError(f"model {body.model!r} ships no demo samples")
    where = resolve_inside(folder, body.name)
    if not where.is_file():
        raise BadParameterError(f"{body.name!r} is not an image file")
    return _open_file(ws, settings, where)
