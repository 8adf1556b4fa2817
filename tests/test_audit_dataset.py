"""Dataset intake: class folders, CSV manifests, hashes, and clear errors for bad input."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from pellucid.core.audit.dataset import load_dataset
from pellucid.core.errors import DataError


def _png(path: Path, value: int = 100, size: tuple[int, int] = (16, 12)) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(np.full((size[1], size[0], 3), value, dtype=np.uint8)).save(path)


def test_class_folders(tmp_path: Path) -> None:
    _png(tmp_path / "crack" / "a.png", 10)
    _png(tmp_path / "crack" / "deeper" / "b.png", 20)
    _png(tmp_path / "sound" / "c.png", 30)
    (tmp_path / "sound" / "notes.txt").write_text("not an image")
    (tmp_path / "stray.png").write_bytes(b"")
    ds = load_dataset(tmp_path)
    assert ds.source == "folders"
    assert [i.rel for i in ds.items] == ["crack/a.png", "crack/deeper/b.png", "sound/c.png"]
    assert [i.label for i in ds.items] == ["crack", "crack", "sound"]
    assert ds.items[0].size == (16, 12)
    assert len(ds.items[0].sha256) == 64
    assert any("ignored" in n for n in ds.notes)
    assert ds.counts() == {"crack": 2, "sound": 1}


def test_hash_changes_with_content_and_is_stable(tmp_path: Path) -> None:
    _png(tmp_path / "a" / "x.png", 10)
    _png(tmp_path / "b" / "y.png", 20)
    h1 = load_dataset(tmp_path).hash
    assert load_dataset(tmp_path).hash == h1
    _png(tmp_path / "b" / "y.png", 21)
    assert load_dataset(tmp_path).hash != h1


def test_unreadable_images_are_skipped_and_listed(tmp_path: Path) -> None:
    _png(tmp_path / "crack" / "good.png")
    (tmp_path / "crack" / "empty.png").write_bytes(b"")
    (tmp_path / "crack" / "text.png").write_text("<html>not a picture</html>")
    good = (tmp_path / "crack" / "good.png").read_bytes()
    (tmp_path / "sound").mkdir()
    (tmp_path / "sound" / "cut.png").write_bytes(good[: len(good) // 2])
    ds = load_dataset(tmp_path)
    assert [i.rel for i in ds.items] == ["crack/good.png"]
    skipped = {s.rel: s.reason for s in ds.skipped}
    assert set(skipped) == {"crack/empty.png", "crack/text.png", "sound/cut.png"}
    assert "empty" in skipped["crack/empty.png"]
    assert ds.summary()["skipped"][0]["reason"]


def test_empty_folder(tmp_path: Path) -> None:
    with pytest.raises(DataError, match=r"nothing to audit.*class subfolders"):
        load_dataset(tmp_path)
    (tmp_path / "crack").mkdir()
    with pytest.raises(DataError, match="nothing to audit"):
        load_dataset(tmp_path)


def test_only_unreadable_images(tmp_path: Path) -> None:
    (tmp_path / "crack").mkdir()
    (tmp_path / "crack" / "a.png").write_bytes(b"garbage")
    with pytest.raises(DataError, match="none of its 1 image file"):
        load_dataset(tmp_path)


def test_missing_path(tmp_path: Path) -> None:
    with pytest.raises(DataError, match="does not exist"):
        load_dataset(tmp_path / "nope")
    (tmp_path / "x.txt").write_text("hi")
    with pytest.raises(DataError, match=r"not a .csv manifest"):
        load_dataset(tmp_path / "x.txt")


def test_manifest_with_boxes_and_masks(tmp_path: Path) -> None:
    _png(tmp_path / "img" / "a.png", size=(20, 20))
    _png(tmp_path / "img" / "b.png", size=(20, 20))
    _png(tmp_path / "img" / "c.png", size=(20, 20))
    mask = np.zeros((20, 20), dtype=np.uint8)
    mask[2:6, 3:9] = 255
    Image.fromarray(mask).save(tmp_path / "m.png")
    (tmp_path / "list.csv").write_text(
        "path,label,box_x0,box_y0,box_x1,box_y1,mask,extra\n"
        "img/a.png,crack,1,2,10,12,,x\n"
        "img/b.png,chip,,,,,m.png,y\n"
        "img/c.png,sound,,,,,,z\n"
    )
    ds = load_dataset(tmp_path / "list.csv")
    assert ds.source == "manifest"
    by = {i.rel: i for i in ds.items}
    assert by["img/a.png"].box == (1, 2, 10, 12)
    assert by["img/b.png"].mask is not None and by["img/b.png"].mask_sha256
    assert by["img/c.png"].box is None
    assert any("extra" in n for n in ds.notes)
    assert ds.manifest_sha256 and len(ds.manifest_sha256) == 64


def test_manifest_single_box_column_and_missing_file(tmp_path: Path) -> None:
    _png(tmp_path / "a.png")
    (tmp_path / "m.csv").write_text('path,label,box\na.png,crack,"1 2 5 6"\ngone.png,crack,\n')
    ds = load_dataset(tmp_path / "m.csv")
    assert ds.items[0].box == (1, 2, 5, 6)
    assert [s.rel for s in ds.skipped] == ["gone.png"]
    assert "no such file" in ds.skipped[0].reason


@pytest.mark.parametrize("text, message", [
    ("file,class\na.png,crack\n", "at least the columns 'path' and 'label'"),
    ("", "at least the columns 'path' and 'label'"),
    ("path,label\na.png,\n", "line 2: every row needs a path and a label"),
    ("path,label\na.png,crack\na.png,sound\n", "listed twice"),
    ("path,label,box_x0,box_y0,box_x1,box_y1\na.png,crack,1,2,,\n", "needs all four"),
    ("path,label,box_x0,box_y0,box_x1,box_y1\na.png,crack,1,2,x,4\n", "must be a number"),
    ("path,label,box_x0,box_y0,box_x1,box_y1\na.png,crack,5,5,2,9\n", "empty or negative"),
    ("path,label\na.png,crack,surplus\n", "more cells than the header"),
    ("path,label,box\na.png,crack,1 2 3\n", "four numbers"),
])
def test_malformed_manifest(tmp_path: Path, text: str, message: str) -> None:
    _png(tmp_path / "a.png")
    (tmp_path / "m.csv").write_text(text)
    with pytest.raises(DataError, match=message):
        load_dataset(tmp_path / "m.csv")


def test_manifest_not_utf8(tmp_path: Path) -> None:
    (tmp_path / "m.csv").write_bytes(b"path,label\n\xff\xfe,crack\n")
    with pytest.raises(DataError, match="not UTF-8"):
        load_dataset(tmp_path / "m.csv")


def test_folder_with_manifest_uses_it(tmp_path: Path) -> None:
    from pellucid.demo.tiles import make_split, write_folder

    write_folder(make_split("clean", per_class=2, seed=1), tmp_path)
    ds = load_dataset(tmp_path)
    assert ds.source == "manifest"
    assert len(ds.items) == 8
    assert sum(1 for i in ds.items if i.box is not None) == 6  # sound tiles have no defect box
