"""The dashboard's durable work: images and maps kept in the store survive a restart (a new app over
the same ``--store`` folder), a map stays bound to the image it was computed for, and the reading
aids (units, flat-map warning, check estimates) say what they should."""

from __future__ import annotations

import io
import time

import numpy as np
from conftest import TINY_SIZE, png_bytes, synthetic_tile
from fastapi.testclient import TestClient
from PIL import Image

from pellucid.core.workbench import reading
from pellucid.web.app import create_app

TAGGED = png_bytes(synthetic_tile(seed=21, tagged=True))
PLAIN = png_bytes(synthetic_tile(seed=22))


def _upload(client, data: bytes, name: str) -> dict:
    r = client.post("/api/images", files={"file": (name, data, "image/png")})
    assert r.status_code == 200, r.text
    return r.json()


def _wait(client, job_id: str, timeout: float = 60.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, f"job still {status['state']}"
        time.sleep(0.02)


def _start(client, image: str, method: str, **body) -> dict:
    r = client.post("/api/jobs", json={"image": image, "method": method, **body})
    assert r.status_code == 202, r.text
    return r.json()


def _plain_error(r, status: int, *words: str) -> None:
    assert r.status_code == status, (r.status_code, r.text)
    detail = r.json()["detail"]
    assert isinstance(detail, str) and "Traceback" not in detail
    for w in words:
        assert w in detail, (w, detail)


def test_images_maps_and_checks_survive_a_restart(web_settings) -> None:
    with TestClient(create_app(web_settings)) as first:
        image = _upload(first, TAGGED, "tagged.png")
        assert image["link"] == f"/image?image={image['id']}"
        done = _wait(first, _start(first, image["id"], "occlusion", params={"patch": 8, "stride": 4},
                                   target="crack")["id"])
        assert done["state"] == "done" and done["image"] == image["id"] and done["unit"] == "patch positions"
        rid = done["result_id"]
        before = first.get(f"/api/results/{rid}").json()
        faith = first.post(f"/api/results/{rid}/faithfulness").json()
        assert _wait(first, faith["id"])["state"] == "done"

    # A new process over the same store folder: a new app, nothing in memory.
    with TestClient(create_app(web_settings)) as second:
        listed = second.get("/api/images").json()
        assert [i["id"] for i in listed] == [image["id"]]
        assert second.get(f"/api/images/{image['id']}").json()["name"] == "tagged.png"
        thumb = second.get(listed[0]["thumbnail"])
        assert thumb.status_code == 200 and Image.open(io.BytesIO(thumb.content)).format == "PNG"
        assert second.get(f"/api/images/{image['id']}/prepared").status_code == 200
        maps = second.get(f"/api/images/{image['id']}/maps").json()["maps"]
        assert [m["id"] for m in maps] == [rid] and maps[0]["checks"] == ["faithfulness"]
        assert maps[0]["link"] == f"/image?model=tiny&image={image['id']}&map={rid}"
        assert second.get(maps[0]["thumbnail"]).status_code == 200
        after = second.get(f"/api/results/{rid}").json()
        assert np.array_equal(np.array(after["values"]), np.array(before["values"]))
        assert after["faithfulness"]["deletion_auc"] is not None
        assert after["link"] == maps[0]["link"]
        # The same request again is served from the store, not computed again.
        again = _start(second, image["id"], "occlusion", params={"patch": 8, "stride": 4}, target=1)
        assert again["cached"] is True and _wait(second, again["id"])["result_id"] == rid


def test_forgetting_an_image_forgets_its_maps_and_their_files(web_settings) -> None:
    with TestClient(create_app(web_settings)) as client:
        keep = _upload(client, PLAIN, "plain.png")["id"]
        gone = _upload(client, TAGGED, "tagged.png")["id"]
        rid = _wait(client, _start(client, gone, "saliency")["id"])["result_id"]
        kept_map = _wait(client, _start(client, keep, "saliency")["id"])["result_id"]
        r = client.delete(f"/api/images/{gone}")
        assert r.status_code == 200 and r.json()["files_removed"] >= 2
        _plain_error(client.get(f"/api/images/{gone}"), 404, gone[:16])
        _plain_error(client.delete(f"/api/images/{gone}"), 404, gone[:16])
        assert [i["id"] for i in client.get("/api/images").json()] == [keep]
        assert client.get(f"/api/results/{kept_map}").status_code == 200
    with TestClient(create_app(web_settings)) as client:  # and after a restart, too
        _plain_error(client.get(f"/api/results/{rid}"), 404, rid[:24])
        assert client.get(f"/api/results/{kept_map}").status_code == 200


def test_a_map_stays_with_the_image_it_was_started_for(web_settings) -> None:
    with TestClient(create_app(web_settings)) as client:
        first = _upload(client, TAGGED, "tagged.png")["id"]
        job = _start(client, first, "occlusion", params={"patch": 2, "stride": 1, "engine": "naive"})
        assert job["image"] == first and job["image_name"] == "tagged.png"
        second = _upload(client, PLAIN, "plain.png")["id"]  # the user opens another image meanwhile
        done = _wait(client, job["id"], timeout=120)
        assert done["state"] == "done" and done["image"] == first
        assert done["link"].endswith(f"image={first}&map={done['result_id']}")
        assert client.get(f"/api/results/{done['result_id']}").json()["image"] == first
        assert client.get(f"/api/images/{second}/maps").json()["maps"] == []
        assert [m["id"] for m in client.get(f"/api/images/{first}/maps").json()["maps"]] == [done["result_id"]]
        # The newest-used image comes first in the list of recent images.
        assert [i["id"] for i in client.get("/api/images").json()][:2] == [second, first]


def test_sanity_progress_counts_maps_and_its_estimate_matches(web_settings) -> None:
    with TestClient(create_app(web_settings)) as client:
        image = _upload(client, TAGGED, "tagged.png")["id"]
        rid = _wait(client, _start(client, image, "saliency")["id"])["result_id"]
        est = client.get(f"/api/results/{rid}/estimate", params={"check": "sanity"}).json()
        assert est["units"] == "maps" and est["done"] is False and est["seconds"] > 0
        job = client.post(f"/api/results/{rid}/sanity").json()
        assert job["unit"] == "maps"
        done = _wait(client, job["id"])
        sanity = client.get(f"/api/results/{rid}").json()["sanity"]
        # Cascading randomisation computes the trained model's map and one map per randomisation step
        # (Adebayo et al., Sanity Checks for Saliency Maps, NeurIPS 2018, section 3.1): progress counts those.
        assert done["total"] == len(sanity["steps"]) + 1 == done["done"]
        assert est["count"] == done["total"]
        faith = client.get(f"/api/results/{rid}/estimate", params={"check": "faithfulness"}).json()
        f_job = _wait(client, client.post(f"/api/results/{rid}/faithfulness").json()["id"])
        scored = client.get(f"/api/results/{rid}").json()["faithfulness"]["curves"]
        assert faith["units"] == "curve points"
        assert faith["count"] == len(scored["deletion"]["fractions"]) + len(scored["insertion"]["fractions"])
        assert f_job["state"] == "done"
        _plain_error(client.get(f"/api/results/{rid}/estimate", params={"check": "speed"}), 422, "speed")


def test_flat_map_warning_and_units() -> None:
    # common practice, no source: a constant map has no spatial information to show.
    assert "zero everywhere" in reading.flat_map_warning(np.zeros((4, 4)), method_title="RISE")
    nearly = np.full((8, 8), 0.5) + np.linspace(0, 0.001, 64).reshape(8, 8)
    assert "nearly flat" in reading.flat_map_warning(nearly, method_title="RISE")
    varied = np.linspace(-1, 1, 64).reshape(8, 8)
    assert reading.flat_map_warning(varied, method_title="RISE") is None
    assert "probability" in reading.map_unit("occlusion", {"output": "probability"}, "crack")
    assert "pre-softmax" in reading.map_unit("occlusion", {"output": "logit"}, "crack")
    assert reading.progress_unit("rise") == "masks" and reading.progress_unit("sanity") == "maps"


def test_result_names_its_unit_and_warns_on_a_flat_map(web_settings) -> None:
    with TestClient(create_app(web_settings)) as client:
        # A uniform grey picture: hiding any patch of it with the image's mean colour changes nothing, so
        # occlusion's map is zero everywhere (Zeiler & Fergus, Visualizing and Understanding Convolutional
        # Networks, ECCV 2014: the map is the drop in the class score when the patch is hidden).
        grey = _upload(client, png_bytes(np.full((TINY_SIZE, TINY_SIZE, 3), 128, np.uint8)), "grey.png")["id"]
        rid = _wait(client, _start(client, grey, "occlusion", params={"patch": 8, "stride": 8})["id"])["result_id"]
        body = client.get(f"/api/results/{rid}").json()
        assert body["unit"] == "probability drop (0–1)"
        assert "when this area is hidden" in body["value_label"]
        assert body["warning"] and "zero everywhere" in body["warning"]


def test_a_custom_baseline_is_refused_in_one_sentence(web_settings) -> None:
    with TestClient(create_app(web_settings)) as client:
        image = _upload(client, TAGGED, "tagged.png")["id"]
        r = client.post("/api/jobs", json={"image": image, "method": "integrated_gradients",
                                           "params": {"baseline": "custom"}})
        _plain_error(r, 422, "custom", "another baseline")
        assert client.get("/api/jobs").json()["active"] == 0
