"""Dataset intake for audits: a folder of class subfolders, or a CSV manifest.

Folder form::

    DIR/crack/0001.png        the subfolder names are the labels; files below them at any depth
    DIR/sound/0002.jpg

If ``DIR/manifest.csv`` exists it is used instead (it can carry object boxes and masks).

Manifest form (``path,label`` required; the rest optional; other columns are ignored and named in
the notes)::

    path,label,box_x0,box_y0,box_x1,box_y1,mask
    crack/0001.png,crack,10,12,60,40,
    chip/0007.png,chip,,,,,masks/0007.png

``path`` and ``mask`` are relative to the manifest's folder (absolute paths are allowed).
A box is four pixel coordinates (x0, y0, x1, y1) with exclusive ends, in the image as stored
(after its EXIF orientation); a single ``box`` column with "x0 y0 x1 y1" works too. A mask is an
image of the same size whose non-zero pixels are the object.

Every file is hashed (sha256) and decoded once at intake: files that cannot be read are skipped
and listed, never fatal. The dataset hash covers every item's path, label, file hash, box and
mask hash, so two runs on the same hash saw the same data.

Confinement. ``load_dataset(…, confine=True)`` (what the server uses) reads nothing outside the
dataset's folder: manifest rows with ``../`` or absolute paths, masks elsewhere and class folders
or files that are symbolic links leading out are skipped and listed, by the one rule of
``core/confine.py``. Either way the dataset records ``allowed_root``: its folder when every image
and mask lies inside it, else None, so a server can tell which stored runs it may show.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass, field
from pathlib import Path

from pellucid.core.confine import is_inside
from pellucid.core.errors import DataError, ImageDecodeError
from pellucid.core.model.preprocess import read_image
from pellucid.core.progress import CancelToken, ProgressFn, step

__all__ = ["IMAGE_SUFFIXES", "MANIFEST_NAME", "Dataset", "DatasetItem", "SkippedFile", "load_dataset"]

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".gif", ".bmp", ".tif", ".tiff", ".webp")
MANIFEST_NAME = "manifest.csv"
_BOX_COLUMNS = ("box_x0", "box_y0", "box_x1", "box_y1")
_KNOWN_COLUMNS = {"path", "label", "box", "mask", *_BOX_COLUMNS}
MAX_ITEMS = 200_000

Box = tuple[int, int, int, int]


@dataclass(frozen=True)
class DatasetItem:
    """One image of the dataset. ``rel`` is the path relative to the root, with '/' separators."""

    index: int
    rel: str
    path: Path
    label: str
    sha256: str
    size: tuple[int, int]  # (width, height) after EXIF orientation
    box: Box | None = None
    mask: Path | None = None
    mask_sha256: str | None = None

    def to_dict(self) -> dict:
        return {
            "index": self.index, "rel": self.rel, "label": self.label, "sha256": self.sha256,
            "size": list(self.size), "box": list(self.box) if self.box else None,
            "mask": str(self.mask) if self.mask else None, "mask_sha256": self.mask_sha256,
        }


@dataclass(frozen=True)
class SkippedFile:
    rel: str
    reason: str

    def to_dict(self) -> dict:
        return {"rel": self.rel, "reason": self.reason}


@dataclass(frozen=True)
class Dataset:
    """The images an audit will read, in a stable order, with what was skipped and why."""

    root: Path
    source: str  # "folders" or "manifest"
    manifest: Path | None
    manifest_sha256: str | None
    items: tuple[DatasetItem, ...]
    skipped: tuple[SkippedFile, ...]
    hash: str
    notes: tuple[str, ...] = field(default_factory=tuple)
    # The folder every image and mask lies inside (the root), or None when some lie elsewhere.
    allowed_root: Path | None = None

    @property
    def labels(self) -> list[str]:
        return sorted({item.label for item in self.items})

    def counts(self) -> dict[str, int]:
        out: dict[str, int] = {}
        for item in self.items:
            out[item.label] = out.get(item.label, 0) + 1
        return dict(sorted(out.items()))

    def summary(self) -> dict:
        return {
            "root": str(self.root),
            "source": self.source,
            "manifest": str(self.manifest) if self.manifest else None,
            "manifest_sha256": self.manifest_sha256,
            "hash": self.hash,
            "images": len(self.items),
            "per_class": self.counts(),
            "with_box": sum(1 for i in self.items if i.box is not None),
            "with_mask": sum(1 for i in self.items if i.mask is not None),
            "skipped": [s.to_dict() for s in self.skipped],
            "notes": list(self.notes),
            "allowed_root": str(self.allowed_root) if self.allowed_root else None,
        }


def _rel(path: Path, root: Path) -> str:
    try:
        return path.relative_to(root).as_posix()
    except ValueError:
        return path.as_posix()


def _hash_and_check(path: Path, rel: str) -> tuple[str | None, tuple[int, int] | None, str | None]:
    """(sha256, (w, h), None) for a readable image, else (None, None, reason)."""
    try:
        data = path.read_bytes()
    except OSError as exc:
        return None, None, f"cannot be read ({exc.strerror or exc})"
    try:
        image = read_image(data, name=rel)
    except ImageDecodeError as exc:
        return None, None, str(exc)
    return hashlib.sha256(data).hexdigest(), image.pil.size, None


def _dataset_hash(items: list[DatasetItem]) -> str:
    h = hashlib.sha256()
    for item in items:
        box = ",".join(map(str, item.box)) if item.box else ""
        h.update(f"{item.rel}\t{item.label}\t{item.sha256}\t{box}\t{item.mask_sha256 or ''}\n".encode())
    return h.hexdigest()


_OUTSIDE = ("lies outside the dataset folder (through '..', an absolute path or a symbolic link); files "
            "outside it are not read")


def _scan_folders(root: Path, *, confine: bool = False) -> tuple[list[tuple[Path, str]], list[str]]:
    pairs: list[tuple[Path, str]] = []
    notes: list[str] = []
    stray = [p.name for p in sorted(root.iterdir()) if p.is_file() and not p.name.startswith(".")]
    if stray:
        notes.append(f"{len(stray)} file(s) directly in the folder were ignored (images go in class subfolders): "
                     + ", ".join(stray[:5]) + (" …" if len(stray) > 5 else ""))
    other = 0
    for sub in sorted(p for p in root.iterdir() if p.is_dir() and not p.name.startswith(".")):
        if confine and not is_inside(root, sub):
            notes.append(f"class folder {sub.name!r} is a symbolic link out of the dataset folder; it was not read")
            continue
        for path in sorted(sub.rglob("*")):
            if not path.is_file() or any(part.startswith(".") for part in path.relative_to(root).parts):
                continue
            if path.suffix.lower() in IMAGE_SUFFIXES:
                pairs.append((path, sub.name))
            else:
                other += 1
    if other:
        notes.append(f"{other} file(s) without an image suffix ({', '.join(IMAGE_SUFFIXES)}) were ignored")
    return pairs, notes


def _parse_int(value: str, what: str, line: int, manifest: Path) -> int:
    try:
        return round(float(value))
    except ValueError:
        raise DataError(
            f"{manifest.name} line {line}: {what} must be a number of pixels; received {value!r}"
        ) from None


def _parse_box(row: dict[str, str], line: int, manifest: Path) -> Box | None:
    if row.get("box", "").strip():
        parts = row["box"].replace(",", " ").split()
        if len(parts) != 4:
            raise DataError(
                f"{manifest.name} line {line}: box must hold four numbers 'x0 y0 x1 y1'; received {row['box']!r}"
            )
        values = [_parse_int(p, "box", line, manifest) for p in parts]
    else:
        cells = [row.get(c, "") or "" for c in _BOX_COLUMNS]
        filled = [c.strip() for c in cells if c.strip()]
        if not filled:
            return None
        if len(filled) != 4:
            raise DataError(
                f"{manifest.name} line {line}: a box needs all four of {', '.join(_BOX_COLUMNS)} "
                f"(or none); received {cells}"
            )
        values = [_parse_int(c, name, line, manifest) for c, name in zip(cells, _BOX_COLUMNS)]
    x0, y0, x1, y1 = values
    if x1 <= x0 or y1 <= y0 or min(values) < 0:
        raise DataError(
            f"{manifest.name} line {line}: box {values} is empty or negative; expected x0 < x1 and y0 < y1, "
            "in pixels with exclusive ends"
        )
    return (x0, y0, x1, y1)


def _read_manifest(manifest: Path) -> tuple[list[tuple[Path, str, Box | None, Path | None, int]], list[str]]:
    try:
        text = manifest.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise DataError(f"manifest {str(manifest)!r} is not UTF-8 text; save it as a UTF-8 CSV file") from None
    except OSError as exc:
        raise DataError(f"cannot read manifest {str(manifest)!r}: {exc.strerror or exc}") from None
    try:
        reader = csv.DictReader(io.StringIO(text))
        header = [h.strip() for h in (reader.fieldnames or [])]
    except csv.Error as exc:
        raise DataError(f"manifest {str(manifest)!r} is not valid CSV: {exc}") from None
    if "path" not in header or "label" not in header:
        raise DataError(
            f"manifest {str(manifest)!r} must start with a header naming at least the columns 'path' and "
            f"'label'; its first line reads {header or '(empty)'}"
        )
    reader.fieldnames = header
    notes: list[str] = []
    extra = [h for h in header if h not in _KNOWN_COLUMNS]
    if extra:
        notes.append(f"manifest columns not used by the audit: {', '.join(extra)}")
    base = manifest.parent
    rows: list[tuple[Path, str, Box | None, Path | None, int]] = []
    seen: dict[str, int] = {}
    try:
        for row in reader:
            line = reader.line_num
            if None in row:
                raise DataError(
                    f"{manifest.name} line {line}: more cells than the header's {len(header)} columns; "
                    "quote values that contain commas"
                )
            if not any((v or "").strip() for v in row.values()):
                continue
            rel = (row.get("path") or "").strip()
            label = (row.get("label") or "").strip()
            if not rel or not label:
                raise DataError(f"{manifest.name} line {line}: every row needs a path and a label; received "
                                f"path={rel!r}, label={label!r}")
            if rel in seen:
                raise DataError(f"{manifest.name} line {line}: {rel!r} is listed twice (first on line {seen[rel]})")
            seen[rel] = line
            box = _parse_box(row, line, manifest)
            mask_ref = (row.get("mask") or "").strip()
            mask = (base / mask_ref) if mask_ref else None
            rows.append((base / rel, label, box, mask, line))
            if len(rows) > MAX_ITEMS:
                raise DataError(f"manifest {str(manifest)!r} lists more than {MAX_ITEMS:,} images; split it")
    except csv.Error as exc:
        raise DataError(f"manifest {str(manifest)!r} is not valid CSV near line {reader.line_num}: {exc}") from None
    return rows, notes


def load_dataset(
    source: str | Path,
    *,
    confine: bool = False,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> Dataset:
    """Read a folder of class subfolders or a CSV manifest; hash and check every image.

    Raises DataError when there is nothing to audit (a missing or empty folder, a malformed
    manifest, no readable image); unreadable images are skipped and listed in ``skipped``.
    With ``confine`` nothing outside the dataset's folder is read (see the module docstring).
    """
    src = Path(source).expanduser()
    if confine and src.is_file():
        raise DataError("a confined dataset is a folder (class subfolders or manifest.csv), not a manifest file")
    if not src.exists():
        raise DataError(f"dataset {str(src)!r} does not exist; give a folder of class subfolders or a CSV manifest")
    manifest: Path | None = None
    if src.is_file():
        if src.suffix.lower() != ".csv":
            raise DataError(f"dataset {str(src)!r} is a file but not a .csv manifest; give a folder or a manifest")
        manifest, root = src, src.parent
    else:
        root = src
        if (src / MANIFEST_NAME).is_file():
            manifest = src / MANIFEST_NAME
    root = root.resolve()

    notes: list[str] = []
    entries: list[tuple[Path, str, Box | None, Path | None]] = []
    if manifest is not None:
        if confine and not is_inside(root, manifest):
            raise DataError(f"{MANIFEST_NAME} in {str(src)!r} is a symbolic link out of the dataset folder; "
                            "it was not read")
        rows, notes = _read_manifest(manifest)
        entries = [(p, label, box, mask) for p, label, box, mask, _ in rows]
        if src.is_dir():
            notes.insert(0, f"read {MANIFEST_NAME} in the folder (it lists labels, boxes and masks)")
    else:
        pairs, notes = _scan_folders(root, confine=confine)
        entries = [(p, label, None, None) for p, label in pairs]
    if not entries:
        where = f"manifest {str(manifest)!r} lists no images" if manifest else (
            f"folder {str(src)!r} holds no images in class subfolders")
        raise DataError(f"nothing to audit: {where}. Expected DIR/<label>/<image> files or a CSV manifest "
                        f"with columns path,label")

    items: list[DatasetItem] = []
    skipped: list[SkippedFile] = []
    contained = True
    entries.sort(key=lambda e: _rel(e[0].resolve() if e[0].exists() else e[0], root))
    for n, (path, label, box, mask) in enumerate(entries):
        step(n, len(entries), progress=progress, cancel=cancel)
        rel = _rel(path.resolve() if path.exists() else path, root)
        image_outside = not is_inside(root, path)
        mask_outside = mask is not None and not is_inside(root, mask)
        if confine and (image_outside or mask_outside):
            skipped.append(SkippedFile(rel, f"it {_OUTSIDE}" if image_outside else f"its mask {_OUTSIDE}"))
            continue
        contained = contained and not (image_outside or mask_outside)
        if not path.is_file():
            skipped.append(SkippedFile(rel, "listed in the manifest but there is no such file"))
            continue
        sha, size, reason = _hash_and_check(path, rel)
        if sha is None or size is None:
            skipped.append(SkippedFile(rel, reason or "unreadable"))
            continue
        mask_sha = None
        if mask is not None:
            if not mask.is_file():
                skipped.append(SkippedFile(rel, f"its mask {mask.name!r} does not exist"))
                continue
            mask_sha, _, mask_reason = _hash_and_check(mask, _rel(mask, root))
            if mask_sha is None:
                skipped.append(SkippedFile(rel, f"its mask cannot be read: {mask_reason}"))
                continue
        if box is not None and (box[0] >= size[0] or box[1] >= size[1]):
            skipped.append(SkippedFile(rel, f"its box {list(box)} lies outside the {size[0]}×{size[1]} image"))
            continue
        items.append(DatasetItem(index=len(items), rel=rel, path=path.resolve(), label=label, sha256=sha,
                                 size=size, box=box, mask=mask.resolve() if mask else None, mask_sha256=mask_sha))
    step(len(entries), len(entries), progress=progress, cancel=cancel)
    if not items:
        raise DataError(
            f"nothing to audit in {str(src)!r}: none of its {len(entries)} image file(s) could be read "
            f"(first problem: {skipped[0].rel}: {skipped[0].reason})"
        )
    manifest_sha = hashlib.sha256(manifest.read_bytes()).hexdigest() if manifest else None
    return Dataset(root=root, source="manifest" if manifest else "folders", manifest=manifest,
                   manifest_sha256=manifest_sha, items=tuple(items), skipped=tuple(skipped),
                   hash=_dataset_hash(items), notes=tuple(notes), allowed_root=root if contained else None)
