"""The bad-input matrix: odd files, odd models and odd parameters, through the API and the CLI.

One row per case. Each row runs twice: against the JSON API of one in-process server (a TestClient
with its lifespan running) and through ``pellucid`` in-process (``pellucid.cli.main``). An error
must be a 4xx JSON body with a plain sentence (API) and a non-zero exit with exactly one line on
stderr (CLI); a case that should succeed must succeed and say what it converted. After every
case the server still answers /api/status, and the image and result stored before the matrix
began are still there.

The tiny models are built by the factories in this module (spec kind "factory",
``test_bad_inputs:build_…``; pytest puts tests/ on sys.path).
"""

from __future__ import annotations

import base64
import io
import json
import os
import struct
import time
import zlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import png_bytes, synthetic_tile
from PIL import Image
from torch import nn

SIZE = 32
LABELS = ("sound", "crack", "chip", "bubble")


# --- tiny models -------------------------------------------------------------------------------


class _Net(nn.Module):
    """conv → ReLU → global pool → linear; ``mode`` picks what forward returns."""

    def __init__(self, *, channels: int = 3, mode: str = "tensor") -> None:
        super().__init__()
        self.mode = mode
        self.features = nn.Sequential(nn.Conv2d(channels, 4, 3, padding=1), nn.ReLU())
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.head = nn.Linear(4, len(LABELS))

    def forward(self, x: torch.Tensor):
        f = self.features(x)
        logits = self.head(self.pool(f).flatten(1))
        if self.mode == "tuple":
            return logits, f
        if self.mode == "dict":  # the first entry is NOT the logits: only output_key finds them
            return {"features": f, "logits": logits}
        if self.mode == "nan":
            return logits * float("nan")
        return logits


def _seeded(**kw) -> nn.Module:
    torch.manual_seed(0)
    return _Net(**kw)


def build_rgb() -> nn.Module:
    return _seeded()


def build_gray() -> nn.Module:
    return _seeded(channels=1)


def build_tuple() -> nn.Module:
    return _seeded(mode="tuple")


def build_dict() -> nn.Module:
    return _seeded(mode="dict")


def build_nan() -> nn.Module:
    return _seeded(mode="nan")


def write_spec(folder: Path, name: str, *, factory: str = "build_rgb", channels: int = 3, weights: str | None = None,
               output_key: str | None = None, kind: str = "factory", input_extra: str = "",
               height: str = str(SIZE)) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    source = [f'kind = "{kind}"']
    if kind == "factory":
        source.append(f'factory = "test_bad_inputs:{factory}"')
    if weights:
        source.append(f'weights = "{weights}"')
    if output_key:
        source.append(f'output_key = "{output_key}"')
    labels = ", ".join(f'"{s}"' for s in LABELS)
    mean = ", ".join(["0.5"] * channels)
    std = ", ".join(["0.25"] * channels)
    text = "\n".join([
        f'name = "{name}"', "", "[source]", *source, "",
        "[input]", f"height = {height}", f"width = {SIZE}", f"channels = {channels}", input_extra, "",
        "[preprocess]", f"mean = [{mean}]", f"std = [{std}]", "",
        "[output]", 'kind = "softmax"', f"labels = [{labels}]", "",
    ])
    path = folder / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _save_state(path: Path, state: dict) -> None:
    from safetensors.torch import save_file

    save_file({k: v.contiguous() for k, v in state.items()}, str(path))


def make_specs(folder: Path) -> dict[str, Path]:
    specs = {
        "rgb": write_spec(folder, "rgb"),
        "gray": write_spec(folder, "gray", factory="build_gray", channels=1),
        "tuple": write_spec(folder, "tuple", factory="build_tuple"),
        "dict": write_spec(folder, "dict", factory="build_dict", output_key="logits"),
        "dict-no-key": write_spec(folder, "dict-no-key", factory="build_dict"),
        "nan": write_spec(folder, "nan", factory="build_nan"),
    }
    (folder / "garbage.safetensors").write_bytes(np.random.default_rng(5).bytes(4096))
    specs["garbage"] = write_spec(folder, "garbage", weights="garbage.safetensors")
    good = build_rgb().state_dict()
    missing = {k: v for k, v in good.items() if k != "head.bias"}
    _save_state(folder / "missing.safetensors", missing)
    specs["missing"] = write_spec(folder, "missing", weights="missing.safetensors")
    _save_state(folder / "unexpected.safetensors", {**good, "extra.weight": torch.zeros(2)})
    specs["unexpected"] = write_spec(folder, "unexpected", weights="unexpected.safetensors")
    torch.save(build_rgb(), folder / "whole.pt")
    specs["pickled"] = write_spec(folder, "pickled", kind="pickled", weights="whole.pt")
    specs["unknown-key"] = write_spec(folder, "unknown-key", input_extra='colour = "blue"')
    specs["wrong-type"] = write_spec(folder, "wrong-type", height='"thirty-two"')
    return specs


# --- odd files ---------------------------------------------------------------------------------


def _encode(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def _tile(seed: int = 7) -> Image.Image:
    return Image.fromarray(synthetic_tile(seed=seed, size=SIZE))


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def bomb_png() -> bytes:
    """A 1 kB PNG whose header declares 30000×30000 pixels (a decompression bomb)."""
    header = struct.pack(">IIBBBBB", 30_000, 30_000, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", header) + _chunk(b"IDAT", zlib.compress(b"\x00" * 1000))
            + _chunk(b"IEND", b""))


def png16() -> bytes:
    ramp = (np.arange(SIZE * SIZE).reshape(SIZE, SIZE) * 60).astype(np.uint16)
    return _encode(Image.fromarray(ramp), "PNG")


def cmyk_jpeg() -> bytes:
    return _encode(Image.new("CMYK", (SIZE, SIZE), (0, 128, 255, 0)), "JPEG")


def palette_transparent_png() -> bytes:
    img = Image.new("P", (SIZE, SIZE), 1)
    img.putpalette([0, 0, 0, 200, 120, 40] + [0] * 762)
    img.paste(0, (0, 0, SIZE // 2, SIZE))  # left half uses the transparent index
    return _encode(img, "PNG", transparency=0)


def animated_gif() -> bytes:
    frames = [Image.new("RGB", (SIZE, SIZE), c) for c in ((250, 20, 20), (20, 20, 250), (20, 250, 20))]
    buf = io.BytesIO()
    frames[0].save(buf, "GIF", save_all=True, append_images=frames[1:], duration=80, loop=0)
    return buf.getvalue()


def exif_rotated_jpeg() -> bytes:
    """40×20 as stored, orientation 6 (rotate 90° clockwise to view): upright it is 20×40."""
    exif = Image.Exif()
    exif[0x0112] = 6
    return _encode(Image.new("RGB", (40, 20), (200, 30, 30)), "JPEG", exif=exif.tobytes())


def truncated(fmt: str) -> bytes:
    noise = Image.fromarray(np.random.default_rng(3).integers(0, 255, (SIZE, SIZE, 3), dtype=np.uint8))
    data = _encode(noise, fmt)
    return data[: len(data) // 2]


def gray_png() -> bytes:
    return png_bytes(synthetic_tile(seed=4, size=SIZE)[..., 0])


TILE = png_bytes(synthetic_tile(seed=7, size=SIZE))
UPLOAD_LIMIT = 1_000_000


# --- the context shared by all rows --------------------------------------------------------------


@dataclass
class Ctx:
    client: object
    specs: dict[str, Path]
    root: Path
    tmp: Path
    files: Path
    tile_id: str

    def file(self, name: str, data: bytes) -> Path:
        path = self.files / name
        path.write_bytes(data)
        return path


@dataclass(frozen=True)
class Outcome:
    status: int
    text: str  # the error's detail, or the notes of a success


def _json_outcome(r) -> Outcome:
    body = r.json()
    assert r.headers["content-type"].startswith("application/json")
    if r.status_code >= 400:
        assert isinstance(body.get("detail"), str) and body["detail"], body
        return Outcome(r.status_code, body["detail"])
    return Outcome(r.status_code, json.dumps(body))


def upload(data: bytes, name: str, *, model: str = "rgb") -> Callable[[Ctx], Outcome]:
    """Upload; on success also fetch the prepared view for ``model`` and predict: notes are the outcome."""

    def act(ctx: Ctx) -> Outcome:
        r = ctx.client.post("/api/images", files={"file": (name, data, "application/octet-stream")})
        if r.status_code != 200:
            return _json_outcome(r)
        image = r.json()["id"]
        prep = ctx.client.get(f"/api/images/{image}/prepared", params={"model": model})
        if prep.status_code != 200:
            return _json_outcome(prep)
        pred = ctx.client.post("/api/predict", json={"image": image, "model": model})
        if pred.status_code != 200:
            return _json_outcome(pred)
        return Outcome(200, " | ".join(prep.json()["notes"]))

    return act


def on_model(model: str, route: str = "predict", **body) -> Callable[[Ctx], Outcome]:
    """Load ``model`` and ask it something about the stored tile."""

    def act(ctx: Ctx) -> Outcome:
        r = ctx.client.get(f"/api/models/{model}")
        if r.status_code != 200:
            return _json_outcome(r)
        notes = " | ".join(r.json()["notes"])
        if route == "predict":
            r = ctx.client.post("/api/predict", json={"image": ctx.tile_id, "model": model, **body})
        elif route == "activations":
            r = ctx.client.post("/api/activations", json={"image": ctx.tile_id, "model": model, **body})
        if r.status_code != 200:
            return _json_outcome(r)
        return Outcome(200, notes)

    return act


def job(method: str, params: dict, *, image: Callable[[Ctx], str] | None = None, target=None,
        model: str = "rgb") -> Callable[[Ctx], Outcome]:
    """Start a job; a refused start is the outcome, else the finished job (with the image's notes)."""

    def act(ctx: Ctx) -> Outcome:
        image_id = image(ctx) if image else ctx.tile_id
        body = {"image": image_id, "method": method, "params": params, "model": model}
        if target is not None:
            body["target"] = target
        # json.dumps writes NaN/Infinity literals, as a careless client would.
        r = ctx.client.post("/api/jobs", content=json.dumps(body), headers={"content-type": "application/json"})
        if r.status_code != 202:
            return _json_outcome(r)
        job_id = r.json()["id"]
        deadline = time.time() + 30
        while (state := ctx.client.get(f"/api/jobs/{job_id}").json())["state"] not in ("done", "failed", "cancelled"):
            assert time.time() < deadline, "job did not finish"
            time.sleep(0.02)
        assert state["state"] == "done", state
        res = ctx.client.get(f"/api/results/{state['result_id']}")
        assert res.status_code == 200, res.text
        notes = ctx.client.get(f"/api/images/{image_id}/prepared", params={"model": model}).json()["notes"]
        return Outcome(200, " | ".join(notes))

    return act


def small_image(ctx: Ctx) -> str:
    data = png_bytes(synthetic_tile(seed=8, size=8))
    return ctx.client.post("/api/images", files={"file": ("small.png", data, "image/png")}).json()["id"]


def folder(path: str, *, open_it: bool) -> Callable[[Ctx], Outcome]:
    def act(ctx: Ctx) -> Outcome:
        if open_it:
            return _json_outcome(ctx.client.post("/api/folder/open", json={"path": path}))
        return _json_outcome(ctx.client.get("/api/folder", params={"path": path}))

    return act


def spec_error(model: str) -> Callable[[Ctx], Outcome]:
    """A spec that cannot be read: the server starts anyway and names the problem in spec_errors."""

    def act(ctx: Ctx) -> Outcome:
        status = ctx.client.get("/api/status").json()
        message = status["spec_errors"].get(str(ctx.specs[model]))
        assert message, status["spec_errors"]
        r = ctx.client.get(f"/api/models/{model}")
        assert r.status_code == 404  # not on offer
        return Outcome(422, message)

    return act


def oversize_upload(ctx: Ctx) -> Outcome:
    data = b"\x89PNG\r\n\x1a\n" + os.urandom(UPLOAD_LIMIT + 1000)
    return _json_outcome(ctx.client.post("/api/images", files={"file": ("huge.png", data, "image/png")}))


# CLI argv builders: the image is written to a file first.
def cli_image(data: bytes, name: str, *extra: str, model: str = "rgb") -> Callable[[Ctx], list[str]]:
    def argv(ctx: Ctx) -> list[str]:
        return ["inspect", str(ctx.file(name, data)), "--model", str(ctx.specs[model]), "--no-occlusion", *extra]

    return argv


def cli_tile(*extra: str, model: str = "rgb", occlusion: bool = False) -> Callable[[Ctx], list[str]]:
    def argv(ctx: Ctx) -> list[str]:
        flags = [] if occlusion else ["--no-occlusion"]
        return ["inspect", str(ctx.file("tile.png", TILE)), "--model", str(ctx.specs[model]), *flags, *extra]

    return argv


def cli_sparse(ctx: Ctx) -> list[str]:
    path = ctx.files / "huge.png"
    with open(path, "wb") as fh:
        fh.truncate(40 * 1024 * 1024)  # sparse: over the 32 MB default limit without writing it
    return ["inspect", str(path), "--model", str(ctx.specs["rgb"]), "--no-occlusion"]


def cli_outside(ctx: Ctx) -> list[str]:
    # The CLI reads any path its user names (it has no image folder); a path that leads nowhere is the error.
    return ["inspect", str(ctx.root / ".." / "no-such-folder" / "x.png"), "--model", str(ctx.specs["rgb"])]


def cli_serve_images_escape(ctx: Ctx) -> list[str]:
    # `serve --images` must be a folder; a symlink to a file outside is refused before anything starts.
    link = ctx.files / "link-to-file"
    if not link.exists():
        link.symlink_to(ctx.specs["rgb"])
    return ["serve", "--images", str(link), "--model", str(ctx.specs["rgb"]), "--port", "1"]


@dataclass(frozen=True)
class Case:
    id: str
    api: Callable[[Ctx], Outcome]
    cli: Callable[[Ctx], list[str]]
    status: int  # expected API status; 200 for cases that must succeed
    words: tuple[str, ...]  # in the API detail (errors) or the conversion notes (successes)
    cli_words: tuple[str, ...] = ()  # in the CLI's stderr line (errors) or its output (successes)


ERR = 2  # the CLI's exit code for bad input

CASES = [
    # -- not images, empty, damaged ----------------------------------------------------------------
    Case("text-named-png", upload(b"hello, this is a note\n", "note.png"), cli_image(b"hello\n", "note.png"),
         415, ("not an image",), ("not an image",)),
    Case("html-named-png", upload(b"<!doctype html><html><body>hi</body></html>", "page.png"),
         cli_image(b"<html></html>", "page.png"), 415, ("text or markup",), ("text or markup",)),
    Case("svg-named-png", upload(b'<svg xmlns="http://www.w3.org/2000/svg"><rect/></svg>', "vector.png"),
         cli_image(b'<svg xmlns="http://www.w3.org/2000/svg"/>', "vector.png"), 415, ("not an image",),
         ("not an image",)),
    Case("zero-bytes", upload(b"", "empty.png"), cli_image(b"", "empty.png"), 415, ("empty",), ("empty",)),
    Case("truncated-jpeg", upload(truncated("JPEG"), "cut.jpg"), cli_image(truncated("JPEG"), "cut.jpg"),
         415, ("truncated",), ("truncated",)),
    Case("truncated-png", upload(truncated("PNG"), "cut.png"), cli_image(truncated("PNG"), "cut.png"),
         415, ("truncated",), ("truncated",)),
    Case("decompression-bomb", upload(bomb_png(), "bomb.png"), cli_image(bomb_png(), "bomb.png"),
         413, ("decompression bomb",), ("decompression bomb",)),
    Case("oversize-upload", oversize_upload, cli_sparse, 413, ("over the limit",), ("over the upload limit",)),
    # -- odd but valid images: converted, and the conversion is said -------------------------------------
    Case("png-16-bit", upload(png16(), "deep.png"), cli_image(png16(), "deep.png"), 200,
         ("I;16 image scaled", "grayscale image repeated"), ("I;16 image scaled",)),
    Case("cmyk-jpeg", upload(cmyk_jpeg(), "print.jpg"), cli_image(cmyk_jpeg(), "print.jpg"), 200,
         ("CMYK image converted",), ("CMYK image converted",)),
    Case("palette-transparency-png", upload(palette_transparent_png(), "pal.png"),
         cli_image(palette_transparent_png(), "pal.png"), 200,
         ("palette image converted", "transparent pixels composited"), ("transparent pixels composited",)),
    Case("animated-gif-first-frame", upload(animated_gif(), "anim.gif"), cli_image(animated_gif(), "anim.gif"),
         200, ("3 frames: the first frame is used",), ("first frame is used",)),
    Case("exif-rotated-jpeg", upload(exif_rotated_jpeg(), "phone.jpg"),
         cli_image(exif_rotated_jpeg(), "phone.jpg"), 200, ("EXIF orientation (6)",), ("EXIF orientation (6)",)),
    Case("grayscale-to-rgb-model", upload(gray_png(), "gray.png"), cli_image(gray_png(), "gray.png"), 200,
         ("grayscale image repeated into 3 channels",), ("repeated into 3 channels",)),
    Case("rgb-to-grayscale-model", upload(TILE, "colour.png", model="gray"),
         cli_image(TILE, "colour.png", model="gray"), 200, ("converted to grayscale",), ("converted to grayscale",)),
    Case("very-wide-image", upload(png_bytes(np.full((8, 4000, 3), 180, np.uint8)), "strip.png"),
         cli_image(png_bytes(np.full((8, 4000, 3), 180, np.uint8)), "strip.png"), 200,
         ("aspect ratio changed: 4000×8",), ("aspect ratio changed: 4000×8",)),
    Case("image-smaller-than-patch", job("occlusion", {"patch": 16, "stride": 8}, image=small_image),
         cli_image(png_bytes(synthetic_tile(seed=8, size=8)), "small.png", "--patch", "16"), 200,
         ("enlarged 4.0× from 8×8",), ("enlarged 4.0× from 8×8",)),
    # -- parameters ---------------------------------------------------------------------------------------
    Case("patch-larger-than-input", job("occlusion", {"patch": 64, "stride": 8}), cli_tile("--patch", "64",
                                                                                          occlusion=True),
         422, ("larger than the model's 32×32 input",), ("larger than the model's 32×32 input",)),
    Case("nonfinite-nan-param", job("integrated_gradients", {"baseline_value": float("nan")}),
         cli_tile("--method", "integrated_gradients", "--param", "integrated_gradients.baseline_value=nan"),
         422, ("baseline_value", "received nan"), ("baseline_value", "'nan'")),
    Case("nonfinite-infinity-param", job("smoothgrad", {"noise": float("inf")}),
         cli_tile("--method", "smoothgrad", "--param", "smoothgrad.noise=inf"), 422, ("noise", "received inf"),
         ("noise", "'inf'")),
    Case("nonfinite-string-param", job("occlusion", {"patch": "Infinity"}), cli_tile("--patch", "inf",
                                                                                     occlusion=True),
         422, ("patch", "integer"), ("--patch", "invalid int value")),
    Case("huge-stride", job("occlusion", {"stride": 10**9}), cli_tile("--stride", str(10**9), occlusion=True),
         422, ("stride", "from 1 to 4096"), ("stride", "from 1 to 4096")),
    Case("huge-patch", job("occlusion", {"patch": 10**7}), cli_tile("--patch", str(10**7), occlusion=True),
         422, ("patch", "from 1 to 4096"), ("patch", "from 1 to 4096")),
    Case("huge-ig-steps", job("integrated_gradients", {"steps": 10**9}),
         cli_tile("--method", "integrated_gradients", "--param", f"integrated_gradients.steps={10**9}"),
         422, ("steps", "from 1 to 4096"), ("steps", "from 1 to 4096")),
    Case("huge-rise-masks", job("rise", {"masks": 10**9}),
         cli_tile("--method", "rise", "--param", f"rise.masks={10**9}"), 422, ("masks", "from 1 to 100000"),
         ("masks", "from 1 to 100000")),
    Case("huge-smoothgrad-samples", job("smoothgrad", {"samples": 10**8}),
         cli_tile("--method", "smoothgrad", "--param", f"smoothgrad.samples={10**8}"), 422,
         ("samples", "from 1 to 10000"), ("samples", "from 1 to 10000")),
    Case("unknown-method-param", job("occlusion", {"window": 3}),
         cli_tile("--method", "rise", "--param", "rise.window=3"), 422, ("unknown parameter", "window"),
         ("unknown parameter", "window")),
    Case("unknown-layer", on_model("rgb", "activations", layer="features.9"), cli_tile("--layer", "features.9"),
         404, ("no layer named 'features.9'",), ("no layer named 'features.9'",)),
    Case("unknown-class", job("occlusion", {"patch": 8, "stride": 8}, target="dragon"),
         cli_tile("--target", "dragon"), 422, ("unknown class 'dragon'",), ("unknown class 'dragon'",)),
    # -- models ---------------------------------------------------------------------------------------------
    Case("model-returns-tuple", on_model("tuple"), cli_tile(model="tuple"), 200,
         ("returns tuple", "first tensor"), ("returns tuple",)),
    Case("model-returns-dict-output-key", on_model("dict"), cli_tile(model="dict"), 200,
         ("returns dict", "'logits' entry"), ("'logits' entry",)),
    Case("model-returns-dict-no-key", on_model("dict-no-key"), cli_tile(model="dict-no-key"), 422,
         ("(1, 4, 32, 32)", "expected logits"), ("expected logits",)),
    Case("model-nan-outputs", on_model("nan"), cli_tile(model="nan"), 422, ("NaN",), ("NaN",)),
    Case("random-bytes-weights", on_model("garbage"), cli_tile(model="garbage"), 422,
         ("could not read weights",), ("could not read weights",)),
    Case("state-dict-missing-keys", on_model("missing"), cli_tile(model="missing"), 422,
         ("missing keys (1): head.bias",), ("missing keys (1): head.bias",)),
    Case("state-dict-unexpected-keys", on_model("unexpected"), cli_tile(model="unexpected"), 422,
         ("unexpected keys (1): extra.weight",), ("unexpected keys (1): extra.weight",)),
    Case("pickled-without-trust", on_model("pickled"), cli_tile(model="pickled"), 422,
         ("--trust-pickled",), ("--trust-pickled",)),
    Case("spec-unknown-key", spec_error("unknown-key"), cli_tile(model="unknown-key"), 422,
         ("unknown key(s) colour",), ("unknown key(s) colour",)),
    Case("spec-wrong-type", spec_error("wrong-type"), cli_tile(model="wrong-type"), 422,
         ("height must be a int", "thirty-two"), ("height must be a int",)),
    # -- paths ------------------------------------------------------------------------------------------------
    Case("path-outside-root-absolute", folder("/etc/passwd", open_it=True), cli_outside, 422,
         ("absolute path",), ("does not exist",)),
    Case("path-outside-root-dotdot", folder("../outside/secret.png", open_it=True), cli_outside, 422,
         ("'..' is not allowed",), ("does not exist",)),
    Case("symlink-escaping-root-file", folder("escape.png", open_it=True), cli_serve_images_escape, 422,
         ("leads outside the image folder",), ("is not a folder",)),
    Case("symlink-escaping-root-folder", folder("escape-dir", open_it=False), cli_serve_images_escape, 422,
         ("leads outside the image folder",), ("is not a folder",)),
]


# --- fixtures ----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def ctx(tmp_path_factory: pytest.TempPathFactory):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("bad-inputs")
    specs = make_specs(base / "models")
    root = base / "images"
    outside = base / "outside"
    (root / "line-a").mkdir(parents=True)
    outside.mkdir()
    (outside / "secret.png").write_bytes(TILE)
    (root / "line-a" / "ok.png").write_bytes(TILE)
    (root / "escape.png").symlink_to(outside / "secret.png")
    (root / "escape-dir").symlink_to(outside, target_is_directory=True)
    files = base / "files"
    files.mkdir()
    order = ("rgb", *(k for k in specs if k != "rgb"))
    settings = Settings(models=tuple(str(specs[k]) for k in order), include_bundled=False, image_root=root,
                        data_dir=base / "data", max_upload_bytes=UPLOAD_LIMIT, max_images=256, job_workers=2)
    with TestClient(create_app(settings)) as client:
        r = client.post("/api/images", files={"file": ("tile.png", TILE, "image/png")})
        assert r.status_code == 200, r.text
        c = Ctx(client=client, specs=specs, root=root, tmp=base, files=files, tile_id=r.json()["id"])
        # Something stored before the matrix, which every case must leave intact.
        started = client.post("/api/jobs", json={"image": c.tile_id, "method": "occlusion",
                                                 "params": {"patch": 8, "stride": 4}})
        assert started.status_code == 202, started.text
        job_id = started.json()["id"]
        deadline = time.time() + 30
        while (state := client.get(f"/api/jobs/{job_id}").json())["state"] != "done":
            assert state["state"] in ("queued", "running") and time.time() < deadline, state
            time.sleep(0.02)
        c.stored_result = state["result_id"]  # type: ignore[attr-defined]
        c.stored_map = client.get(f"/api/results/{state['result_id']}").json()["values"]  # type: ignore[attr-defined]
        yield c


def _run_cli(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    from pellucid.cli import main

    capsys.readouterr()
    try:
        code = main(argv)
    except SystemExit as exc:  # argparse's own usage errors exit through SystemExit
        code = exc.code if isinstance(exc.code, int) else ERR
    out, err = capsys.readouterr()
    return code, out, err


def test_the_matrix_is_big_enough() -> None:
    assert len(CASES) >= 30 and len({c.id for c in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(case: Case, ctx: Ctx, capsys: pytest.CaptureFixture[str]) -> None:
    # API
    outcome = case.api(ctx)
    assert outcome.status == case.status, (outcome.status, outcome.text)
    assert "Traceback" not in outcome.text
    for word in case.words:
        assert word in outcome.text, (word, outcome.text)
    if case.status >= 400:
        assert 400 <= outcome.status < 500
    # The server keeps serving and nothing stored is lost.
    status = ctx.client.get("/api/status")
    assert status.status_code == 200 and status.json()["models"]
    assert ctx.client.get(f"/api/images/{ctx.tile_id}").status_code == 200
    kept = ctx.client.get(f"/api/results/{ctx.stored_result}")
    assert kept.status_code == 200 and kept.json()["values"] == ctx.stored_map

    # CLI
    out_dir = ctx.tmp / "cli-out" / case.id
    argv = case.cli(ctx)
    if argv[0] == "inspect":
        argv += ["--out", str(out_dir)]
    code, out, err = _run_cli(argv, capsys)
    if case.status >= 400:
        lines = [line for line in err.splitlines() if line.strip()]
        assert code != 0, (code, out, err)
        assert len(lines) == 1, err
        assert lines[0].startswith("pellucid:") and "Traceback" not in err
        for word in case.cli_words:
            assert word in lines[0], (word, lines[0])
    else:
        assert code == 0, (code, err)
        written = (out_dir / "result.json").read_text(encoding="utf-8")
        for word in case.cli_words:
            assert word in out or word in written, (word, out)


# --- what the successes did, checked beyond their notes ---------------------------------------------------


def _prepared_pixels(ctx: Ctx, data: bytes, name: str, model: str = "rgb") -> tuple[dict, np.ndarray]:
    info = ctx.client.post("/api/images", files={"file": (name, data, "image/png")}).json()
    view = ctx.client.get(f"/api/images/{info['id']}/prepared", params={"model": model}).json()
    png = base64.b64decode(view["png"].split(",", 1)[1])
    return info, np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))


def test_animated_gif_shows_its_first_frame(ctx: Ctx) -> None:
    _info, pixels = _prepared_pixels(ctx, animated_gif(), "anim.gif")
    r, g, b = pixels.reshape(-1, 3).mean(axis=0)
    assert r > 200 and g < 60 and b < 60  # the red first frame, not the blue or green ones


def test_exif_orientation_is_honoured(ctx: Ctx) -> None:
    info, _ = _prepared_pixels(ctx, exif_rotated_jpeg(), "phone.jpg")
    assert info["original_size"] == [40, 20]
    assert ctx.client.app.state.workspace.image(info["id"]).pil.size == (20, 40)  # upright: portrait


def test_transparent_half_is_composited_onto_white(ctx: Ctx) -> None:
    _info, pixels = _prepared_pixels(ctx, palette_transparent_png(), "pal.png")
    assert pixels[:, : SIZE // 2 - 1].min() >= 250  # transparent half → white
    assert tuple(pixels[SIZE // 2, -2]) == (200, 120, 40)


def test_pickled_model_does_not_block_the_others(ctx: Ctx) -> None:
    refused = ctx.client.get("/api/models/pickled")
    assert refused.status_code == 422 and "--trust-pickled" in refused.json()["detail"]
    assert ctx.client.post("/api/predict", json={"image": ctx.tile_id, "model": "rgb"}).status_code == 200
    assert "pickled" not in ctx.client.app.state.workspace.loaded()


def test_pickled_model_loads_with_the_trust_flag(ctx: Ctx, tmp_path: Path) -> None:
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    settings = Settings(models=(str(ctx.specs["pickled"]),), include_bundled=False, data_dir=tmp_path,
                        trust_pickled=True)
    with TestClient(create_app(settings)) as client:
        r = client.get("/api/models/pickled")
        assert r.status_code == 200 and any("pickled" in n for n in r.json()["notes"])


def test_spec_errors_are_listed_without_stopping_the_server(ctx: Ctx) -> None:
    body = ctx.client.get("/api/models").json()
    offered = {m["name"] for m in body["models"]}
    assert {"rgb", "gray", "tuple", "dict", "nan", "garbage"} <= offered
    assert "unknown-key" not in offered and "wrong-type" not in offered
    assert set(body["spec_errors"]) == {str(ctx.specs["unknown-key"]), str(ctx.specs["wrong-type"])}


def test_cli_in_a_subprocess_gives_one_line(ctx: Ctx) -> None:
    import subprocess
    import sys

    path = ctx.file("note-sub.png", b"plain text, not an image\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(Path(__file__).parent), str(Path.cwd())])}
    proc = subprocess.run([sys.executable, "-m", "pellucid.cli", "inspect", str(path), "--model",
                           str(ctx.specs["rgb"]), "--out", str(ctx.tmp / "sub-out")],
                          check=False, capture_output=True, text=True, timeout=120, env=env,
                          cwd=Path(__file__).parents[1])
    assert proc.returncode == ERR
    assert proc.stderr.strip().count("\n") == 0 and "not an image" in proc.stderr, proc.stderr

