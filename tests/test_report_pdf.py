"""The report's PDF, read back by tools outside Pellucid: poppler's pdftoppm (pages as pictures) and pdfplumber.

The demo audit (``pellucid demo tiles`` + ``pellucid audit`` with the demo policy) is reported with
``pellucid report``; its PDF must open in two independent readers, carry the verdict on page 1,
keep its tables as table cells whose numbers match a recount made here from the image folder and
the policy file, show the run id, model fingerprint and page number on every page, keep all text
inside the page's margins, and print at the paper size asked for. A second, small folder with
many unreadable files makes a table run over a page break, where its header must repeat.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import tomllib
from pathlib import Path

import numpy as np
import pytest
from conftest import png_bytes, synthetic_tile
from PIL import Image

from pellucid import __version__
from pellucid.cli import main

pdfplumber = pytest.importorskip("pdfplumber", reason="pdfplumber comes with the test extra")

REPO = Path(__file__).resolve().parents[1]
POLICY = REPO / "demo_models" / "policy-demo.toml"
PER_CLASS = 8
MM = 72 / 25.4  # PostScript points per millimetre
# Source: ISO 216:2007 (A4 = 210 × 297 mm); ANSI/ASME Y14.1 (US Letter = 8.5 × 11 in = 612 × 792 pt).
A4 = (210 * MM, 297 * MM)
LETTER = (612.0, 792.0)
MARGIN = 15 * MM  # the print stylesheet's left and right page margins
needs_poppler = pytest.mark.skipif(shutil.which("pdftoppm") is None,
                                   reason="poppler-utils is not installed (make test installs it)")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("report-pdf")
    tiles, store = root / "tiles", root / "store"
    assert main(["demo", "tiles", "--split", "clean", "--per-class", str(PER_CLASS), "--seed", "2",
                 "--out", str(tiles)]) == 0
    code = main(["audit", "--model", "tilenet", "--images", str(tiles), "--policy", str(POLICY),
                 "--out", str(root / "audit"), "--store", str(store), "--quiet"])
    assert code in (0, 1)
    summary = json.loads((root / "audit" / "summary.json").read_text(encoding="utf-8"))
    run_id = summary["run"]["id"]
    assert main(["report", run_id, "--store", str(store), "--out", str(root / "a4")]) == 0
    assert main(["report", run_id, "--store", str(store), "--out", str(root / "letter"), "--paper", "letter"]) == 0
    return {"root": root, "tiles": tiles, "summary": summary, "run": summary["run"],
            "a4": root / "a4" / "report.pdf", "letter": root / "letter" / "report.pdf"}


def _tables(pdf) -> list[tuple[int, list[list[str]]]]:
    """Every table fragment pdfplumber finds from the ruled cells, with its page number (1-based)."""
    out = []
    for n, page in enumerate(pdf.pages, start=1):
        for t in page.extract_tables():
            out.append((n, [[(c or "").replace("\n", " ").strip() for c in row] for row in t]))
    return out


@pytest.mark.slow
def test_both_papers_open_and_carry_their_metadata(demo) -> None:
    run = demo["run"]
    for path, size in ((demo["a4"], A4), (demo["letter"], LETTER)):
        assert path.read_bytes().startswith(b"%PDF-")
        with pdfplumber.open(path) as pdf:
            assert len(pdf.pages) >= 4
            for page in pdf.pages:
                assert abs(page.width - size[0]) < 0.5 and abs(page.height - size[1]) < 0.5, (page.width, page.height)
            # The summary is one page on either paper: it ends on page 1, the evidence starts on page 2.
            first, second = (" ".join(pdf.pages[k].extract_text().split()) for k in (0, 1))
            assert "The sign-off block is left empty for the reviewer." in first, path
            assert "Gate checks" in second and "Gate checks" not in first, path
            meta = pdf.metadata
        assert run["id"] in meta["Title"] and run["model_fingerprint"] in meta["Subject"]
        assert meta["Creator"] == f"Pellucid {__version__}"
        assert "Gate: FAIL" in meta["Subject"]


@pytest.mark.slow
def test_every_page_names_the_run_and_stays_inside_its_margins(demo) -> None:
    run = demo["run"]
    sizes: set[tuple[int, int]] = set()
    with pdfplumber.open(demo["a4"]) as pdf:
        total = len(pdf.pages)
        for n, page in enumerate(pdf.pages, start=1):
            text = page.extract_text()
            assert f"run {run['id']}" in text and f"model sha256 {run['model_fingerprint']}" in text, n
            assert f"page {n} of {total}" in text, n
            # No clipped or overflowing text: every glyph within the left and right margins and on the page.
            outside = [c["text"] for c in page.chars
                       if c["x0"] < MARGIN - 1 or c["x1"] > page.width - MARGIN + 1 or c["top"] < 0
                       or c["bottom"] > page.height]
            assert not outside, (n, "".join(outside)[:80])
            # No link leaves the document.
            assert not [h for h in page.hyperlinks if h.get("uri")], n
            # Pictures keep their pixels and are enlarged without smoothing (PDF 1.7, §8.9.5.3 /Interpolate).
            assert all(im["stream"].attrs.get("Interpolate") is False for im in page.images), n
            sizes.update(tuple(im["srcsize"]) for im in page.images)
    spec = tomllib.loads((REPO / "demo_models" / "tilenet" / "spec.toml").read_text(encoding="utf-8"))["input"]
    assert (spec["width"], spec["height"]) in sizes  # the images as the model saw them, not resampled


@pytest.mark.slow
def test_page_one_carries_the_verdict(demo) -> None:
    policy_sha = hashlib.sha256(POLICY.read_bytes()).hexdigest()
    name = tomllib.loads(POLICY.read_text(encoding="utf-8"))["name"]
    with pdfplumber.open(demo["a4"]) as pdf:
        first = pdf.pages[0].extract_text()
        later = " ".join(p.extract_text() for p in pdf.pages[1:])
    flat = " ".join(first.split())
    assert "FAIL" in flat and f"Gate: FAIL under policy '{name}'" in flat
    assert policy_sha in flat.replace(" ", "")
    assert demo["run"]["model_fingerprint"] in flat.replace(" ", "")
    assert "not proof" in flat and "domain's own rules" in flat  # the caution and whose decision it is
    assert "Model" in flat and "Dataset" in flat and "Reviewer" not in flat  # the sign-off comes later
    assert "Reviewer's sign-off" in later and "Re-running this audit" in later


@pytest.mark.slow
@needs_poppler
def test_page_pictures_show_the_verdict_banner(demo, tmp_path: Path) -> None:
    """pdftoppm renders every page; page 1's upper part holds the verdict banner in the fail colour."""
    with pdfplumber.open(demo["a4"]) as pdf:
        pages = len(pdf.pages)
    out = subprocess.run(["pdftoppm", "-r", "40", "-png", str(demo["a4"]), str(tmp_path / "page")],
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    pngs = sorted(tmp_path.glob("page-*.png"))
    assert len(pngs) == pages  # the second reader sees the same pages
    shutil.copytree(tmp_path, REPO / "test-artifacts" / "report-pages", dirs_exist_ok=True)
    first = np.asarray(Image.open(pngs[0]).convert("RGB")).astype(int)
    h = first.shape[0]

    def near(colour: str) -> np.ndarray:
        rgb = np.array([int(colour[i:i + 2], 16) for i in (1, 3, 5)])
        return np.abs(first - rgb).sum(axis=2) < 40

    # The banner (print stylesheet: fail edge #a2361f, fill #f7e4de) is the first thing in the fail colour
    # from the top, and its fill covers a good part of the page's upper third.
    rows = np.nonzero(near("#a2361f").any(axis=1))[0]
    assert rows.size and rows[0] < h // 4, rows[:3]
    assert near("#f7e4de")[: h // 3].mean() > 0.1
    # Pages are not blank: some ink on each.
    for png in pngs:
        assert (np.asarray(Image.open(png).convert("L")) < 128).mean() > 0.0005, png.name


@pytest.mark.slow
def test_tables_are_cells_with_the_recounted_numbers(demo) -> None:
    """The per-class table, the confusion matrix and the gate's checks, read back as cells, against a recount
    from the image folder (files per class) and the policy file (limits)."""
    tiles = demo["tiles"]
    files = {d.name: len(list(d.glob("*.png"))) for d in sorted(tiles.iterdir()) if d.is_dir()}
    assert sum(files.values()) == 4 * PER_CLASS
    with pdfplumber.open(demo["a4"]) as pdf:
        tables = _tables(pdf)

    per_class = next(rows for _, rows in tables if rows[0][:3] == ["class", "images", "accuracy"])
    body = {r[0]: r for r in per_class[1:]}
    for c, n in files.items():
        assert body[c][1] == str(n), (c, body[c])
    confusion = next(rows for _, rows in tables if rows[0][0].startswith("true"))
    labels = confusion[0][1:-1]
    assert sorted(labels) == sorted(files)
    matrix = {r[0]: [int(v) for v in r[1:-1]] for r in confusion[1:]}
    for c in labels:
        assert sum(matrix[c]) == files[c] == int(dict((r[0], r[-1]) for r in confusion[1:])[c])
    correct = sum(matrix[c][labels.index(c)] for c in labels)
    accuracy = f"{100 * correct / sum(files.values()):.1f}%"
    assert body["all"][2] == accuracy
    for c in labels:
        assert body[c][2] == f"{100 * matrix[c][labels.index(c)] / files[c]:.1f}%"

    # The evidence's table of every check (the summary page lists the first few).
    thresholds = tomllib.loads(POLICY.read_text(encoding="utf-8"))["thresholds"]
    checks = [r for _, rows in tables if rows[0] == ["result", "scope", "policy key", "measured", "limit", "check"]
              for r in rows[1:]]
    assert set(thresholds) <= {r[2] for r in checks}
    words = {"min": "at least", "max": "at most"}
    seen_pass = False
    for result, _scope, key, _measured, limit, _sentence in checks:
        assert result in ("FAIL", "PASS")
        seen_pass = seen_pass or result == "PASS"
        assert not (seen_pass and result == "FAIL"), "failed checks come first"
        if key not in thresholds:  # a check the policy module adds by default, not a limit from this file
            continue
        value = thresholds[key]
        shown = f"{value:g}" if key == "max_failed_images" else f"{100 * value:.1f}%"
        if key == "max_injection_shift":
            shown = f"{value:+.3f}"
        assert limit == f"{words[key[:3]]} {shown}", (key, limit)


@pytest.fixture(scope="module")
def many_unreadable(tmp_path_factory: pytest.TempPathFactory, tiny_spec: Path) -> dict:
    root = tmp_path_factory.mktemp("report-long-table")
    data = root / "data"
    for label, seeds in (("sound", (1, 2, 3)), ("crack", (4, 5, 6))):
        (data / label).mkdir(parents=True)
        for s in seeds:
            (data / label / f"{s}.png").write_bytes(png_bytes(synthetic_tile(seed=s, tagged=label == "crack")))
    broken = [f"sound/cut_{k:02d}.png" for k in range(70)]
    for rel in broken:
        (data / rel).write_bytes(b"\x89PNG\r\n\x1a\n cut short")
    store = root / "store"
    assert main(["audit", "--model", str(tiny_spec), "--images", str(data), "--store", str(store), "--out",
                 str(root / "audit"), "--quiet"]) == 0
    run_id = json.loads((root / "audit" / "summary.json").read_text(encoding="utf-8"))["run"]["id"]
    assert main(["report", run_id, "--store", str(store), "--out", str(root / "report")]) == 0
    return {"pdf": root / "report" / "report.pdf", "broken": broken}


def test_a_long_table_repeats_its_header_on_every_page(many_unreadable) -> None:
    with pdfplumber.open(many_unreadable["pdf"]) as pdf:
        tables = _tables(pdf)
    head = ["image", "stage", "reason"]
    # A file name may wrap inside its cell; the reader gives the pieces with a space between them.
    fragments = [(n, [[c.replace(" ", "") if k == 0 else c for k, c in enumerate(r)] for r in rows])
                 for n, rows in tables if any(r[0].replace(" ", "").startswith("sound/cut_") for r in rows)]
    assert len({n for n, _ in fragments}) >= 2, "the table should run over a page break"
    listed = []
    for n, rows in fragments:
        assert rows[0] == head, (n, rows[0])  # each page's part starts with the header
        listed += [r[0] for r in rows[1:]]
    assert sorted(listed) == sorted(many_unreadable["broken"])  # no row lost or doubled at the break
