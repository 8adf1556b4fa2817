"""Memory and work limits (issue 11, findings 2 and 5): decoded images within a byte budget, jobs
refused before they start when their batches would not fit, large occlusion grids estimated and
capped, and client-given names cleaned.
"""

from __future__ import annotations

import io
from dataclasses import replace

import pytest
from conftest import png_bytes, synthetic_tile
from fastapi.testclient import TestClient
from PIL import Image

from pellucid.core.attribution.budget import JobLimits, check_job, estimate_job, in_flight_bytes, occlusion_grid
from pellucid.core.errors import BadParameterError
from pellucid.web.app import create_app
from pellucid.web.routers.images import clean_name


def _flat_png(side: int) -> bytes:
    """A one-colour PNG: a few hundred bytes on disk, side² × 3 bytes once decoded."""
    buf = io.BytesIO()
    Image.new("RGB", (side, side), (200, 190, 170)).save(buf, "PNG")
    return buf.getvalue()


def test_a_small_file_can_decode_to_a_large_image():
    # The finding: file size says little about decoded size (Pillow decodes to width × height × bands).
    data = _flat_png(1500)
    assert len(data) < 50_000
    assert Image.open(io.BytesIO(data)).size == (1500, 1500)  # 6.75 MB as RGB


def test_decoded_images_stay_within_the_byte_budget(web_settings):
    budget = 16_000_000
    settings = replace(web_settings, max_image_memory=budget, max_images=1000, max_pixels=10_000_000)
    with TestClient(create_app(settings)) as c:
        ws = c.app.state.workspace
        ids = []
        for k in range(6):  # 6 × 6.75 MB would be 40.5 MB: only two fit at a time
            buf = io.BytesIO()
            Image.new("RGB", (1500, 1500), (200, 190, 170 + k)).save(buf, "PNG")
            r = c.post("/api/images", files={"file": (f"big-{k}.png", buf.getvalue(), "image/png")})
            assert r.status_code == 200, r.text
            ids.append(r.json()["id"])
            assert ws.image_cache.bytes_used <= budget
        held = [img["id"] for img in c.get("/api/images").json()]
        assert held == ids[::-1]  # every image is kept in the store, newest first
        assert ws.image_cache.bytes_used == 2 * 1500 * 1500 * 3  # but only two are held decoded
        # One that memory let go of is read back from the store when it is used again, within the budget.
        assert ids[0] not in [img.sha256 for img in ws.image_cache.list()]
        assert c.get(f"/api/images/{ids[0]}/prepared").status_code == 200
        assert ws.image_cache.bytes_used <= budget


def test_an_image_larger_than_the_whole_budget_is_refused(web_settings):
    settings = replace(web_settings, max_image_memory=5_000_000, max_pixels=10_000_000)
    with TestClient(create_app(settings)) as c:
        small = c.post("/api/images", files={"file": ("small.png", png_bytes(synthetic_tile(seed=1)), "image/png")})
        r = c.post("/api/images", files={"file": ("huge.png", _flat_png(1500), "image/png")})
        assert r.status_code == 413, r.text
        assert "6.8 MB" in r.json()["detail"] and "5.0 MB" in r.json()["detail"]
        assert [i["id"] for i in c.get("/api/images").json()] == [small.json()["id"]]  # nothing lost


def test_least_recently_used_is_evicted_first(web_settings):
    settings = replace(web_settings, max_image_memory=2 * 1500 * 1500 * 3, max_pixels=10_000_000)
    with TestClient(create_app(settings)) as c:
        def upload(k: int) -> str:
            buf = io.BytesIO()
            Image.new("RGB", (1500, 1500), (k, 0, 0)).save(buf, "PNG")
            return c.post("/api/images", files={"file": (f"{k}.png", buf.getvalue(), "image/png")}).json()["id"]

        a, b = upload(1), upload(2)
        c.post("/api/predict", json={"image": b, "k": 1})  # b is prepared now: its input is cached too
        assert c.post("/api/predict", json={"image": a, "k": 1}).status_code == 200  # a is used: b is the oldest use
        upload(3)
        held = {img.sha256 for img in c.app.state.workspace.image_cache.list()}
        assert a in held and b not in held  # b, the oldest use, left memory (its prepared input with it)
        # b is still in the store: using it again reads it back (and memory lets go of another).
        assert c.post("/api/predict", json={"image": b, "k": 1}).status_code == 200
        assert c.app.state.workspace.image_cache.bytes_used <= 2 * 1500 * 1500 * 3


# --- per-job limits ----------------------------------------------------------------------------------


def test_occlusion_grid_matches_an_independent_count():
    # Positions 0, s, 2s, … up to H − p, plus one flush with the border (our layout, as the engine
    # lays it out; counted here by brute force).
    for size, patch, stride in ((224, 1, 1), (224, 16, 8), (32, 5, 3), (96, 12, 12), (10, 11, 1)):
        along = sorted({min(t, size - patch) for t in range(0, size, stride)} if patch <= size else set())
        assert occlusion_grid((size, size), patch, stride) == len(along) ** 2, (size, patch, stride)
    assert occlusion_grid((224, 224), 1, 1) == 50_176  # the probe's figure


def test_rise_batches_that_would_not_fit_are_refused_with_the_limit(client: TestClient):
    image = client.post("/api/images", files={"file": ("t.png", png_bytes(synthetic_tile(seed=2)), "image/png")})
    ws = client.app.state.workspace
    per_image = ws.job_estimate(ws.model(), "rise", {"masks": 64, "grid": 7, "keep": 0.5, "batch_size": 1,
                                                     "seed": 0}).bytes_per_image
    ws.settings = replace(ws.settings, max_job_memory=100 * per_image)  # room for 100 images per batch
    r = client.post("/api/jobs", json={"image": image.json()["id"], "method": "rise",
                                       "params": {"masks": 64, "batch_size": 101}})
    assert r.status_code == 422, r.text
    assert "per job: use batch_size 100 or less" in r.json()["detail"]
    assert client.get("/api/status").json()["jobs_running"] == 0  # refused before a job existed
    r = client.post("/api/jobs", json={"image": image.json()["id"], "method": "rise",
                                       "params": {"masks": 64, "batch_size": 100}})
    assert r.status_code == 202, r.text


def test_memory_limit_with_a_model_of_known_size():
    # A 224×224 RGB input whose one leaf layer outputs 64×112×112 floats (as a 7×7 stride-2 stem does):
    # the figures below are counted by hand from the module docstring's rule.
    class Row:
        def __init__(self, shape):
            self.output_shape, self.is_leaf, self.calls = shape, True, 1

    class Map:
        def __init__(self):
            self.rows = [Row((1, 64, 112, 112))]

    flight = in_flight_bytes(Map(), (3, 224, 224))
    assert flight.forward == 4 * (2 * 150_528 + 3 * 802_816) and flight.backward == 4 * (150_528 + 802_816)
    params = {"masks": 2000, "grid": 7, "keep": 0.5, "batch_size": 2048, "seed": 0}
    est = estimate_job("rise", params, input_shape=(3, 224, 224), in_flight=flight, seconds_per_forward=0.01)
    assert est.peak_bytes == 2048 * flight.forward and est.forwards == 2000 and est.seconds == pytest.approx(20.0)
    # 2048 × 4 × (2 × 150,528 + 3 × 802,816) B = 22.19 GB; 2 GiB / 10,837,016 B = 198.2 images.
    with pytest.raises(BadParameterError, match=r"22\.2 GB .* allows 2\.1 GB per job: use batch_size 198 or less"):
        check_job(est, params, JobLimits(max_job_bytes=2 * 1024**3, max_occlusion_positions=20_000))


def test_large_occlusion_grids_are_estimated_then_refused(client: TestClient):
    image = client.post("/api/images", files={"file": ("t.png", png_bytes(synthetic_tile(seed=2)), "image/png")})
    ws = client.app.state.workspace
    settings = replace(ws.settings, max_occlusion_positions=500)
    ws.settings = settings  # this server's configured maximum, lowered for the tiny model's 32 px input
    est = client.post("/api/estimate", json={"method": "occlusion", "params": {"patch": 1, "stride": 1}})
    assert est.status_code == 200, est.text
    body = est.json()
    assert body["positions"] == 32 * 32 and body["allowed"] is False and body["seconds"] > 0
    assert "1,024 occlusion positions" in body["refusal"] and "at most 500" in body["refusal"]
    assert "stride of at least 2 px with a patch at least as large" in body["refusal"]
    r = client.post("/api/jobs", json={"image": image.json()["id"], "method": "occlusion",
                                       "params": {"patch": 1, "stride": 1}})
    assert r.status_code == 422 and r.json()["detail"] == body["refusal"]
    ok = client.post("/api/estimate", json={"method": "occlusion", "params": {"patch": 4, "stride": 2}}).json()
    assert ok["allowed"] is True and ok["positions"] == 15 * 15 and ok["refusal"] is None
    assert client.post("/api/jobs", json={"image": image.json()["id"], "method": "occlusion",
                                          "params": {"patch": 4, "stride": 2}}).status_code == 202


def test_audits_over_http_respect_the_job_limits(client: TestClient):
    ws = client.app.state.workspace
    ws.settings = replace(ws.settings, max_job_memory=1_000_000)
    r = client.post("/api/audits", json={"source": {"kind": "demo", "per_class": 2}, "method": "rise",
                                         "params": {"masks": 16, "batch_size": 4096}})
    assert r.status_code == 422 and "per job" in r.json()["detail"], r.text


# --- names ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("raw, expected", [
    ("tile.png", "tile.png"),
    ("C:\\Users\\me\\tile.png", "tile.png"),
    ("../../etc/passwd", "passwd"),
    ("ti\x00le.png", "tile.png"),
    ("a\x1b[31mred\x1b[0m.png", "a[31mred[0m.png"),
    ("\x00", "upload"),
    ("..", "upload"),
    ("", "upload"),
    (None, "upload"),
    ("x" * 300 + ".png", "x" * 116 + ".png"),
])
def test_upload_names_are_cleaned(raw, expected):
    assert clean_name(raw) == expected


def test_uploaded_names_keep_no_nul_or_backslash(client: TestClient):
    # Raw multipart, as a hostile client can send it (httpx would percent-encode the NUL).
    boundary = "pellucid-test-boundary"
    body = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"C:\\photos\\ti\x00le.png\"\r\n"
            "Content-Type: image/png\r\n\r\n").encode("latin-1") + png_bytes(synthetic_tile(seed=4)) + \
        f"\r\n--{boundary}--\r\n".encode()
    r = client.post("/api/images", content=body,
                    headers={"Content-Type": f"multipart/form-data; boundary={boundary}"})
    assert r.status_code == 200, r.text
    assert r.json()["name"] == "tile.png"
    assert all(c.isprintable() and c != "\\" for c in client.get("/api/images").json()[0]["name"])


# --- colour scales ---------------------------------------------------------------------------------------


def test_colour_scales_beyond_float32_are_refused(client: TestClient):
    # Maps are float32: a scale end beyond its largest finite value (3.4028235e38; Source: IEEE 754-2019,
    # binary32) cannot be drawn and once gave a 200 with a garbage overlay.
    image = client.post("/api/images", files={"file": ("t.png", png_bytes(synthetic_tile(seed=5)), "image/png")})
    job = client.post("/api/jobs", json={"image": image.json()["id"], "method": "saliency"}).json()
    ws = client.app.state.workspace
    rid = ws.jobs.wait(job["id"], timeout=60).meta["result_id"]
    for query in ({"vmin": -1e39, "vmax": 1e39}, {"vmin": 0, "vmax": 4e38}, {"vmin": "-inf", "vmax": 1},
                  {"vmin": 0, "vmax": "nan"}, {"vmin": 0, "vmax": 1e-40}):
        for path in (f"/api/results/{rid}", f"/api/results/{rid}/overlay.png"):
            r = client.get(path, params=query)
            assert r.status_code == 422, (query, path, r.status_code)
            assert "vmin" in r.json()["detail"]
    r = client.get(f"/api/results/{rid}", params={"vmin": -3e38, "vmax": 3e38})
    assert r.status_code == 200  # wide, but within float32: drawn
    assert client.get(f"/api/results/{rid}/overlay.png", params={"vmin": 0, "vmax": 1}).status_code == 200
