"""The JSON API in-process (TestClient runs the lifespan): results, caching, jobs and every error path."""

from __future__ import annotations

import hashlib
import io
import time

import numpy as np
import pytest
import torch
from conftest import TINY_LABELS, TINY_MODULE, TINY_SIZE, png_bytes, synthetic_tile
from PIL import Image

TILE = png_bytes(synthetic_tile(seed=11, tagged=True))


def _upload(client, data: bytes = TILE, name: str = "tile.png"):
    return client.post("/api/images", files={"file": (name, data, "image/png")})


def _image_id(client) -> str:
    r = _upload(client)
    assert r.status_code == 200, r.text
    return r.json()["id"]


def _wait(client, job_id: str, timeout: float = 60.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, f"job still {status['state']}"
        time.sleep(0.02)


def _run(client, image: str, method: str = "occlusion", **body) -> dict:
    r = client.post("/api/jobs", json={"image": image, "method": method, **body})
    assert r.status_code == 202, r.text
    return _wait(client, r.json()["id"])


def _module(client):
    return client.app.state.workspace.model().module


def _tensor(client, image_id: str) -> torch.Tensor:
    ws = client.app.state.workspace
    return ws.prepared(ws.model(), image_id).tensor


def _assert_plain_error(r, status: int, *words: str) -> None:
    assert r.status_code == status, (r.status_code, r.text)
    body = r.json()
    assert isinstance(body["detail"], str) and body["detail"]
    assert "Traceback" not in body["detail"]
    for w in words:
        assert w in body["detail"], (w, body["detail"])


def _still_serving(client) -> None:
    r = client.get("/api/status")
    assert r.status_code == 200 and r.json()["models"]


# --- models ------------------------------------------------------------------------------------


def test_model_list_and_summary(client, tiny_spec) -> None:
    r = client.get("/api/models")
    assert r.status_code == 200
    body = r.json()
    assert body["default"] == "tiny" and [m["name"] for m in body["models"]] == ["tiny"]
    assert body["models"][0]["has_samples"] is True
    s = client.get("/api/models/tiny").json()
    weights = (tiny_spec.parent / "weights.safetensors").read_bytes()
    # A factory model's fingerprint covers its weights and its factory's source (README, "Fingerprints").
    source = (tiny_spec.parent.parent / "_modules" / f"{TINY_MODULE}.py").read_bytes()
    text = "\n".join(["pellucid-factory-fingerprint/1", f"weights {hashlib.sha256(weights).hexdigest()}",
                      f"factory {TINY_MODULE}:tiny_net", f"source {hashlib.sha256(source).hexdigest()}",
                      "arguments {}"]) + "\n"
    assert s["fingerprint"] == hashlib.sha256(text.encode()).hexdigest()
    assert s["labels"] == list(TINY_LABELS)
    assert s["input_shape"] == [3, TINY_SIZE, TINY_SIZE]
    assert s["conv_layers"] == ["features.conv1", "features.conv2"]
    assert client.get("/api/models").json()["models"][0]["loaded"] is True


def test_layer_map_totals_match_the_module(client) -> None:
    body = client.get("/api/models/tiny/layers").json()
    module = _module(client)
    assert body["total_params"] == sum(p.numel() for p in module.parameters())
    rows = {r["name"]: r for r in body["rows"]}
    # Conv 3→8, 3×3, stride 1, padding 1 on 32×32: 32·32·8·3·9 MACs, receptive field 3 (common practice, no source).
    assert rows["features.conv1"]["macs"] == 32 * 32 * 8 * 3 * 9
    assert rows["features.conv1"]["rf_size"] == [3, 3]
    assert "features.relu1" in body["feature_layers"] and "head" not in body["feature_layers"]
    assert body["default_feature_layer"] == "features.conv2"


def test_kernels_first_conv_and_other_layers(client) -> None:
    module = _module(client)
    body = client.get("/api/models/tiny/kernels").json()
    assert body["layer"] == "features.conv1" and body["view"] == "rgb"
    assert body["filters"] == list(range(8)) and body["png"].startswith("data:image/png;base64,")
    w = module.features.conv1.weight.detach().reshape(8, -1)
    assert np.allclose(body["norms"], w.norm(dim=1).numpy(), rtol=1e-5)
    other = client.get("/api/models/tiny/kernels", params={"layer": "features.conv2"}).json()
    assert other["view"] == "channels" and other["rows"] == 16 and other["cols"] == 8
    lo, hi = other["value_range"]
    assert lo == pytest.approx(-hi)  # diverging scale centred at zero
    one = client.get("/api/models/tiny/kernels", params={"layer": "features.conv2", "filter": 3}).json()
    assert one["filters"] == [3]


def test_kernels_flag_dead_and_duplicate_filters(client) -> None:
    module = _module(client)
    saved = module.features.conv1.weight.detach().clone()
    try:
        with torch.no_grad():
            module.features.conv1.weight[2].zero_()
            module.features.conv1.weight[5].copy_(module.features.conv1.weight[4] * 2.0)
        body = client.get("/api/models/tiny/kernels").json()
    finally:
        with torch.no_grad():
            module.features.conv1.weight.copy_(saved)
    assert body["dead"] == [2]
    assert [(p["a"], p["b"]) for p in body["near_duplicates"]] == [(4, 5)]


# --- images ------------------------------------------------------------------------------------


def test_upload_gives_sha256_id_and_prepared_view(client) -> None:
    r = _upload(client)
    assert r.status_code == 200
    info = r.json()
    assert info["id"] == hashlib.sha256(TILE).hexdigest()
    assert info["original_size"] == [TINY_SIZE, TINY_SIZE]
    view = client.get(f"/api/images/{info['id']}/prepared").json()
    assert view["size"] == [TINY_SIZE, TINY_SIZE] and view["png"].startswith("data:image/png")
    assert client.get("/api/images").json()[0]["id"] == info["id"]


def test_upload_conversion_notes_reach_the_client(client) -> None:
    rgba = np.dstack([synthetic_tile(seed=3), np.full((TINY_SIZE, TINY_SIZE), 128, np.uint8)])
    info = _upload(client, png_bytes(rgba, mode="RGBA"), "clear.png").json()
    assert any("alpha" in n or "transparent" in n for n in info["notes"])
    view = client.get(f"/api/images/{info['id']}/prepared").json()
    assert view["notes"] == info["notes"]


def test_samples_list_and_open(client) -> None:
    body = client.get("/api/samples", params={"model": "tiny"}).json()
    assert [s["name"] for s in body["samples"]] == ["tile-0.png", "tile-1.png", "tile-2.png"]
    r = client.post("/api/samples/open", json={"model": "tiny", "name": "tile-1.png"})
    assert r.status_code == 200
    _assert_plain_error(client.post("/api/samples/open", json={"model": "tiny", "name": "../spec.toml"}), 422, "..")


def test_folder_browse_stays_inside_its_root(client) -> None:
    top = client.get("/api/folder").json()
    names = [(e["name"], e["kind"]) for e in top["entries"]]
    assert names == [("line-a", "folder"), ("sound-1.png", "image")]  # no text file, no escaping links
    sub = client.get("/api/folder", params={"path": "line-a"}).json()
    assert sub["parent"] == "" and [e["path"] for e in sub["entries"]] == ["line-a/tagged-1.png"]
    r = client.post("/api/folder/open", json={"path": "line-a/tagged-1.png"})
    assert r.status_code == 200 and r.json()["name"] == "tagged-1.png"

    _assert_plain_error(client.get("/api/folder", params={"path": "../"}), 422, "..")
    _assert_plain_error(client.get("/api/folder", params={"path": "line-a/../.."}), 422, "..")
    _assert_plain_error(client.get("/api/folder", params={"path": "/etc"}), 422, "absolute")
    _assert_plain_error(client.post("/api/folder/open", json={"path": "/etc/passwd"}), 422, "absolute")
    _assert_plain_error(client.post("/api/folder/open", json={"path": "escape.png"}), 422, "outside")
    _assert_plain_error(client.get("/api/folder", params={"path": "escape-dir"}), 422, "outside")
    _assert_plain_error(client.post("/api/folder/open", json={"path": "escape-dir/secret.png"}), 422, "outside")
    _assert_plain_error(client.post("/api/folder/open", json={"path": "missing.png"}), 404, "missing.png")
    _assert_plain_error(client.post("/api/folder/open", json={"path": "notes.txt"}), 415)
    _still_serving(client)


def test_folder_without_root_says_so(tiny_spec, tmp_path) -> None:
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    settings = Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=tmp_path)
    with TestClient(create_app(settings)) as c:
        _assert_plain_error(c.get("/api/folder"), 404, "image folder")


# --- inspection --------------------------------------------------------------------------------


def test_predict_matches_a_direct_forward(client) -> None:
    image = _image_id(client)
    body = client.post("/api/predict", json={"image": image, "k": 4}).json()
    probs = [c["probability"] for c in body["top"]]
    assert sum(probs) == pytest.approx(1.0, abs=1e-5)  # softmax over all 4 classes
    assert probs == sorted(probs, reverse=True)
    with torch.inference_mode():
        logits = _module(client)(_tensor(client, image))
    assert body["top"][0]["index"] == int(logits.argmax())


def test_activations_sorted_and_one_channel(client) -> None:
    image = _image_id(client)
    module = _module(client)
    captured = {}
    handle = module.features.relu1.register_forward_hook(lambda m, i, o: captured.setdefault("out", o.detach()))
    try:
        with torch.inference_mode():
            module(_tensor(client, image))
    finally:
        handle.remove()
    maps = captured["out"][0].numpy()
    body = client.post("/api/activations", json={"image": image, "layer": "features.relu1", "sort": "max"}).json()
    assert body["output_shape"] == [8, TINY_SIZE, TINY_SIZE]
    expected = list(np.argsort(-maps.reshape(8, -1).max(axis=1), kind="stable"))
    assert body["layout"]["channels"] == expected
    assert np.allclose(body["channel_mean"], maps.reshape(8, -1).mean(axis=1), rtol=1e-5, atol=1e-6)
    ch = client.post("/api/activations/channel", json={"image": image, "layer": "features.relu1", "channel": 3}).json()
    assert np.allclose(np.array(ch["values"]), maps[3], rtol=1e-4, atol=1e-6)
    assert ch["vmin"] == pytest.approx(float(maps[3].min()), abs=1e-6)


# --- jobs and results --------------------------------------------------------------------------


def test_occlusion_job_result_and_cache(client) -> None:
    from pellucid.core.occlusion.engine import occlusion_map

    image = _image_id(client)
    status = _run(client, image, params={"patch": 8, "stride": 4}, target="crack")
    assert status["state"] == "done" and status["fraction"] == 1.0 and status["result_id"]
    result = client.get(f"/api/results/{status['result_id']}").json()
    assert result["method"] == "occlusion" and result["target_label"] == "crack" and result["target"] == 1
    assert result["engine"] in ("batched", "incremental", "naive")
    assert result["signed"] is True and result["vmin"] == pytest.approx(-result["vmax"])
    assert "not proof" in result["caution"]
    direct = occlusion_map(_module(client), _tensor(client, image), target=1, patch=8, stride=4, method="batched")
    assert np.allclose(np.array(result["values"]), direct.drop, rtol=2e-3, atol=1e-6)

    again = client.post("/api/jobs", json={"image": image, "params": {"patch": 8, "stride": 4}, "target": 1}).json()
    assert again["cached"] is True
    assert _wait(client, again["id"])["result_id"] == status["result_id"]

    png = client.get(f"/api/results/{status['result_id']}/overlay.png", params={"opacity": 0.4})
    assert png.status_code == 200 and png.headers["content-type"] == "image/png"
    assert Image.open(io.BytesIO(png.content)).size == (TINY_SIZE, TINY_SIZE)


QUICK_PARAMS = {
    "gradcam": {},
    "saliency": {},
    "gradient_x_input": {},
    "smoothgrad": {"samples": 4},
    "integrated_gradients": {"steps": 8},
    "rise": {"masks": 40, "batch_size": 20},
    "occlusion": {"patch": 8, "stride": 8},
}


def test_every_registered_method_runs_as_a_job(client) -> None:
    image = _image_id(client)
    methods = client.get("/api/methods").json()["methods"]
    names = [m["name"] for m in methods]
    assert "occlusion" in names
    for name in names:
        status = _run(client, image, method=name, params=QUICK_PARAMS.get(name, {}))
        assert status["state"] == "done", (name, status["error"])
        result = client.get(f"/api/results/{status['result_id']}").json()
        values = np.array(result["values"])
        assert values.shape == (TINY_SIZE, TINY_SIZE), name
        assert result["vmin"] < result["vmax"]


def test_cancel_stops_a_running_job(client) -> None:
    image = _image_id(client)
    r = client.post("/api/jobs", json={"image": image, "params": {"patch": 1, "stride": 1, "engine": "naive"}})
    job = r.json()["id"]
    assert client.post(f"/api/jobs/{job}/cancel").status_code == 200
    status = _wait(client, job)
    assert status["state"] == "cancelled" and status["result_id"] is None
    _still_serving(client)


def test_two_jobs_at_once_both_finish(client) -> None:
    image = _image_id(client)
    a = client.post("/api/jobs", json={"image": image, "params": {"patch": 4, "stride": 2}}).json()["id"]
    b = client.post("/api/jobs", json={"image": image, "method": "saliency"}).json()["id"]
    assert _wait(client, a)["state"] == "done" and _wait(client, b)["state"] == "done"


def test_shared_scale_for_compare(client) -> None:
    image = _image_id(client)
    other = _upload(client, png_bytes(synthetic_tile(seed=12)), "plain.png").json()["id"]
    r1 = _run(client, image, params={"patch": 8, "stride": 4})["result_id"]
    r2 = _run(client, other, params={"patch": 8, "stride": 4})["result_id"]
    scale = client.get("/api/scale", params=[("results", r1), ("results", r2)]).json()
    ws = client.app.state.workspace
    bound = max(float(np.abs(ws.result(r).amap.map).max()) for r in (r1, r2))
    assert scale["signed"] is True and scale["vmax"] == pytest.approx(bound) and scale["vmin"] == pytest.approx(-bound)
    shared = client.get(f"/api/results/{r1}", params={"vmin": scale["vmin"], "vmax": scale["vmax"]}).json()
    assert shared["vmax"] == pytest.approx(bound)
    unsigned = _run(client, image, method="saliency")["result_id"]
    _assert_plain_error(client.get("/api/scale", params=[("results", r1), ("results", unsigned)]), 422, "signed")


def test_faithfulness_sanity_and_ranking(client) -> None:
    image = _image_id(client)
    occ = _run(client, image, params={"patch": 8, "stride": 4}, target=1)["result_id"]
    sal = _run(client, image, method="saliency", target=1)["result_id"]
    _assert_plain_error(client.get("/api/ranking", params=[("results", occ), ("results", sal)]), 422,
                        "faithfulness first")
    for rid in (occ, sal):
        r = client.post(f"/api/results/{rid}/faithfulness")
        assert r.status_code == 202 and _wait(client, r.json()["id"])["state"] == "done"
    body = client.get(f"/api/results/{occ}").json()
    curves = body["faithfulness"]["curves"]
    # The deletion curve starts from the whole image, so its first score is the model's probability for the
    # target. Source: Petsiuk, Das, Saenko, RISE: Randomized Input Sampling for Explanation of Black-box
    # Models, BMVC 2018, the deletion metric (section number from memory, not checked).
    with torch.inference_mode():
        p = torch.softmax(_module(client)(_tensor(client, image)), dim=1)[0, 1].item()
    assert curves["deletion"]["scores"][0] == pytest.approx(p, abs=1e-5)
    assert curves["deletion"]["fractions"][0] == 0.0 and curves["deletion"]["fractions"][-1] == 1.0
    again = client.post(f"/api/results/{occ}/faithfulness").json()
    assert again["cached"] is True
    ranking = client.get("/api/ranking", params=[("results", occ), ("results", sal)]).json()["rows"]
    assert sorted(r["method"] for r in ranking) == ["occlusion", "saliency"]
    assert [r["combined_rank"] for r in ranking] == sorted(r["combined_rank"] for r in ranking)

    r = client.post(f"/api/results/{sal}/sanity")
    assert _wait(client, r.json()["id"])["state"] == "done"
    sanity = client.get(f"/api/results/{sal}").json()["sanity"]
    assert sanity["verdict"] in ("pass", "fail") and len(sanity["steps"]) >= 1
    _assert_plain_error(client.post("/api/results/feedbeef/sanity"), 404, "feedbeef")
    other = _run(client, image, method="saliency", target=2)["result_id"]
    client.post(f"/api/results/{other}/faithfulness")
    _assert_plain_error(client.get("/api/ranking", params=[("results", occ), ("results", other)]), 422, "same")


# --- error paths: a plain 4xx sentence each, and the server keeps serving ----------------------


def test_unknown_layer(client) -> None:
    image = _image_id(client)
    _assert_plain_error(client.post("/api/activations", json={"image": image, "layer": "features.nope"}), 404,
                        "features.nope")
    _assert_plain_error(client.get("/api/models/tiny/kernels", params={"layer": "features.nope"}), 404, "features.nope")
    _assert_plain_error(client.get("/api/models/tiny/kernels", params={"layer": "features.relu1"}), 404,
                        "not a 2-D convolution")
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "method": "gradcam",
                                                       "params": {"layer": "features.nope"}}), 404, "features.nope")
    _still_serving(client)


def test_unknown_class(client) -> None:
    image = _image_id(client)
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "target": "zebra"}), 422, "zebra", "crack")
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "target": 4}), 422, "out of range")
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "target": -1}), 422)
    _still_serving(client)


@pytest.mark.parametrize("params, words", [
    ({"patch": 0}, ("patch", "0")),
    ({"patch": -4}, ("patch", "-4")),
    ({"patch": TINY_SIZE + 1}, ("patch", "larger than")),
    ({"stride": 0}, ("stride", "0")),
    ({"stride": -2}, ("stride", "-2")),
    ({"stride": TINY_SIZE + 5}, ("stride", "larger than")),
    ({"patch": 4, "stride": 6}, ("stride 6", "never be hidden")),
    ({"patch": "big"}, ("patch", "big")),
    ({"baseline": "purple"}, ("baseline", "purple")),
    ({"window": 3}, ("window",)),
])
def test_bad_occlusion_parameters(client, params, words) -> None:
    image = _image_id(client)
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "method": "occlusion", "params": params}),
                        422, *words)
    _still_serving(client)


def test_non_image_upload(client) -> None:
    r = client.post("/api/images", files={"file": ("notes.png", b"just some text, not pixels", "image/png")})
    _assert_plain_error(r, 415, "notes.png", "not an image")
    _assert_plain_error(client.post("/api/images", json={"file": "x"}), 415, "multipart")
    _assert_plain_error(client.post("/api/images", files={"other": ("a.png", TILE, "image/png")}), 415, "'file'")
    _still_serving(client)


def test_over_size_upload(client) -> None:
    big = b"\x89PNG" + bytes(300_000)
    _assert_plain_error(client.post("/api/images", files={"file": ("big.png", big, "image/png")}), 413, "limit")

    # Without a length header (chunked), the limit is enforced while the body is read.
    boundary = "pellucidtestboundary"
    head = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; filename=\"big.png\"\r\n"
            "Content-Type: image/png\r\n\r\n").encode()

    def chunks():
        yield head
        for _ in range(40):
            yield bytes(16_384)
        yield f"\r\n--{boundary}--\r\n".encode()

    r = client.post("/api/images", content=chunks(),
                    headers={"content-type": f"multipart/form-data; boundary={boundary}"})
    _assert_plain_error(r, 413, "limit")
    _still_serving(client)
    assert _upload(client).status_code == 200


def test_unknown_ids(client) -> None:
    image = _image_id(client)
    _assert_plain_error(client.get("/api/models/nope"), 404, "nope", "tiny")
    _assert_plain_error(client.post("/api/predict", json={"model": "nope", "image": image}), 404, "nope")
    _assert_plain_error(client.post("/api/predict", json={"image": "0" * 64}), 404, "upload it again")
    _assert_plain_error(client.get("/api/images/abc/prepared"), 404, "abc")
    _assert_plain_error(client.get("/api/jobs/abc123"), 404, "abc123")
    _assert_plain_error(client.post("/api/jobs/abc123/cancel"), 404, "abc123")
    _assert_plain_error(client.get("/api/results/feedbeef"), 404, "feedbeef")
    _assert_plain_error(client.get("/api/results/feedbeef/overlay.png"), 404, "feedbeef")
    _assert_plain_error(client.post("/api/jobs", json={"image": image, "method": "tea-leaves"}), 422, "tea-leaves",
                        "occlusion")
    _assert_plain_error(client.post("/api/jobs", json={"image": "f" * 64}), 404, "upload it again")
    _still_serving(client)


def test_other_bad_requests(client) -> None:
    image = _image_id(client)
    _assert_plain_error(client.post("/api/activations", json={"image": image, "layer": "features.relu1",
                                                              "sort": "loudest"}), 422, "loudest")
    _assert_plain_error(client.post("/api/activations/channel", json={"image": image, "layer": "features.relu1",
                                                                      "channel": 8}), 422, "8 channels")
    _assert_plain_error(client.post("/api/predict", json={"k": 3}), 422, "image")
    _assert_plain_error(client.post("/api/predict", json={"image": image, "k": 0}), 422, "k")
    _assert_plain_error(client.get("/api/models/tiny/kernels", params={"filter": 99, "layer": "features.conv2"}), 422,
                        "filter_index")
    _still_serving(client)


def test_docs_and_schema_are_offline(client) -> None:
    schema = client.get("/openapi.json").json()
    paths = {"/api/jobs", "/api/results/{result_id}", "/api/images", "/api/models/{name}/kernels"}
    assert paths <= set(schema["paths"])
    page = client.get("/docs")
    assert page.status_code == 200 and "/api/jobs" in page.text
    assert "cdn" not in page.text.lower() and "https://" not in page.text
