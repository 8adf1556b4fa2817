"""The audits page in Chromium: the whole audit job done in the browser.

- the policy editor loads the bundled policy, changes it, and downloads a TOML file that
  ``pellucid audit --policy FILE`` runs with (the values typed here are the reference);
- the folder picker chooses a folder of the ``--images`` tree and an audit runs on it; the run's
  address is /audits?run=ID (back and forward work) and it shows its exact re-run command;
- the suspect-class box offers every label of a 1,000-class model (a small stand-in with the
  ImageNet label list shipped in torchvision's weights metadata) and is searched by typing;
- a long audit asks before it starts;
- a running audit is followed again after a reload, and deleting it says to cancel it first, until
  dismissed, with the cancel button beside the sentence.

Run with ``pytest -m browser``; screenshots land in test-artifacts/screenshots/.
"""

from __future__ import annotations

import json
import re
import sys
import textwrap
from collections.abc import Iterator
from pathlib import Path

import pytest
from _chromium import BROWSER_MARKS, SCREENSHOTS
from _live import live_server
from _slow_model import slow_down, write_slow_spec
from conftest import png_bytes, synthetic_tile, write_tiny_spec

from pellucid.cli import main

pytestmark = BROWSER_MARKS

_WIDE = textwrap.dedent('''
    """A stand-in for a 1,000-class model: one conv stage and a 1,000-way head (for label lists only)."""
    from torch import nn


    def wide_net(num_classes: int = 1000) -> nn.Module:
        return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                             nn.Linear(4, num_classes))
    ''')


def _wide_spec(folder: Path) -> Path:
    import torch
    import torchvision
    from safetensors.torch import save_file

    folder.mkdir(parents=True)
    (folder / "pellucid_wide_net.py").write_text(_WIDE, encoding="utf-8")
    sys.path.insert(0, str(folder))
    import pellucid_wide_net

    torch.manual_seed(0)
    save_file({k: v.contiguous() for k, v in pellucid_wide_net.wide_net().state_dict().items()},
              str(folder / "w.safetensors"))
    # Source: torchvision's ImageNet-1k category names (weights metadata, shipped with the package).
    labels = torchvision.models.ResNet18_Weights.IMAGENET1K_V1.meta["categories"]
    (folder / "labels.txt").write_text("\n".join(labels) + "\n", encoding="utf-8")
    (folder / "spec.toml").write_text(textwrap.dedent('''
        name = "wide-head"
        [source]
        kind = "factory"
        factory = "pellucid_wide_net:wide_net"
        weights = "w.safetensors"
        [input]
        height = 64
        width = 64
        channels = 3
        [preprocess]
        mean = [0.5, 0.5, 0.5]
        std = [0.25, 0.25, 0.25]
        [output]
        kind = "softmax"
        labels_file = "labels.txt"
        '''), encoding="utf-8")
    return folder / "spec.toml"


@pytest.fixture(scope="module")
def setup(tmp_path_factory) -> tuple[Path, object]:
    from pellucid.demo.tiles import make_split, write_folder
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("audit-page")
    images = base / "images"
    write_folder(make_split("clean", per_class=3, seed=7), images / "line" / "week-48")
    (images / "line" / "week-48" / "manifest.csv").unlink()  # class folders only: no boxes, no masks
    (images / "line" / "week-49").mkdir()
    for label, seeds in (("tabby", (1, 2)), ("goldfish", (3, 4))):  # two of the 1,000 labels
        (images / "pets" / label).mkdir(parents=True)
        for s in seeds:
            (images / "pets" / label / f"{s}.png").write_bytes(png_bytes(synthetic_tile(seed=s, size=64)))
    small = write_tiny_spec(base / "small", name="small64", size=64, samples=False)
    slow = write_slow_spec(base / "slow", name="slowtile")
    models = ("tilenet", str(small), str(_wide_spec(base / "wide")), str(slow))
    settings = Settings(models=models, include_bundled=False, image_root=images, data_dir=base / "store")
    return base, settings


@pytest.fixture(scope="module")
def server(setup) -> Iterator[str]:
    slow_down(0)
    try:
        with live_server(setup[1]) as url:
            yield url
    finally:
        slow_down(0)


@pytest.fixture()
def page(browser):
    # Playwright's waiting helpers evaluate strings, which the server's content security policy forbids.
    context = browser.new_context(viewport={"width": 1280, "height": 900}, bypass_csp=True, accept_downloads=True)
    p = context.new_page()
    p.set_default_timeout(60_000)
    yield p
    context.close()


def _shot(page, name: str) -> None:
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / f"{name}.png"), full_page=True)


def _open(page, server: str) -> None:
    page.goto(f"{server}/audits")
    page.locator("#plan-list li").first.wait_for()


def test_policy_editor_downloads_a_toml_file_the_command_line_runs(server: str, page, setup, tmp_path: Path) -> None:
    base, _ = setup
    _open(page, server)
    page.click("#policy-edit")
    page.select_option("#policy-source", "policy-demo")
    page.click("#policy-load")
    page.locator("#policy-toml", has_text="[injection]").wait_for(state="attached")
    assert page.input_value("#limit-max_corner_share") == "0.25"  # Source: demo_models/policy-demo.toml
    page.fill("#policy-name", "week 48 gate")
    page.fill("#limit-min_accuracy", "0.1")
    page.fill("#limit-max_border_share", "0.9")
    page.fill("#override-class", "crack")
    page.select_option("#override-key", "max_corner_share")
    page.fill("#override-value", "0.6")
    page.click("#override-add")
    page.fill("#policy-params", "patch=16, stride=16")
    page.fill("#policy-file-name", "week48")
    with page.expect_download() as info:
        page.click("#policy-download")
    file = tmp_path / "week48.toml"
    info.value.save_as(file)
    assert info.value.suggested_filename == "week48.toml"
    _shot(page, "audit-policy-editor")

    # A bad value is the parser's one sentence, and nothing is saved.
    page.fill("#limit-min_accuracy", "80")
    page.click("#policy-save")
    error = page.locator("#policy-error")
    error.wait_for(state="visible")
    assert "between 0 and 1" in error.inner_text() and not (base / "store" / "policies" / "week48.toml").exists()

    out = tmp_path / "out"
    code = main(["audit", "--model", "tilenet", "--images", str(base / "images" / "line" / "week-48"), "--policy",
                 str(file), "--out", str(out), "--store", str(tmp_path / "store"), "--no-discovery", "--quiet"])
    assert code in (0, 1)
    doc = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    checks = {(c["scope"], c["key"]): c["threshold"] for c in doc["gate"]["checks"]}
    assert doc["gate"]["policy"]["name"] == "week 48 gate"
    assert checks[("run", "min_accuracy")] == 0.1 and checks[("crack", "max_corner_share")] == 0.6
    assert checks[("sound", "max_corner_share")] == 0.25 and checks[("sound", "max_border_share")] == 0.9
    assert doc["run"]["settings"]["audit"]["params"]["stride"] == 16
    assert doc["summary"]["injection"]["settings"]["suspect_class"] == "crack"

    # Saved, it becomes this audit's policy; deleted, it leaves the lists.
    page.fill("#limit-min_accuracy", "0.1")
    page.click("#policy-save")
    page.locator("#policy-message", has_text="Saved as").wait_for()
    assert page.input_value("#policy-select") == "week48"
    page.locator("#plan-list", has_text="week 48 gate").wait_for()
    page.select_option("#policy-source", "week48")
    page.once("dialog", lambda d: d.accept())
    page.click("#policy-delete")
    page.locator("#policy-message", has_text="Deleted week48").wait_for()
    assert page.locator("#policy-select option[value='week48']").count() == 0
    assert not (base / "store" / "policies" / "week48.toml").exists()


def test_folder_picker_runs_an_audit_with_its_address_and_command(server: str, page) -> None:
    _open(page, server)
    page.select_option("#model-select", "small64")
    page.select_option("#source-kind", "folder")
    page.click("#folder-browse")
    page.locator("#folder-list button", has_text="line/").click()
    page.locator("#folder-here", has_text="line").wait_for()
    page.locator("#folder-list button", has_text="week-48/").click()
    page.locator("#folder-here", has_text="week-48").wait_for()
    page.click("#folder-use")
    assert page.input_value("#folder-path") == "line/week-48"
    page.locator("#plan-list", has_text="12 in 4 class(es)").wait_for()
    assert "gradcam" in page.inner_text("#plan-list")  # the core's default for a model that takes hooks
    page.click("#start-button")
    page.locator("#runs-table tbody tr[data-run]").first.wait_for()  # listed while it runs, without Refresh
    page.locator("#run-view[data-loaded]").wait_for(timeout=120_000)
    run_id = page.get_attribute("#run-view", "data-run")
    assert page.url.endswith(f"/audits?run={run_id}")
    command = page.inner_text("#run-command")
    assert command.startswith("pellucid audit") and "line/week-48" in command and "--store" in command
    # No boxes or masks in this folder: the run view does not speak of objects.
    words = page.inner_text("#run-view")
    assert not re.search(r"\bobjects?\b", words, re.IGNORECASE), re.search(r".{60}\bobjects?\b.{20}", words)
    _shot(page, "audit-run-command")

    page.go_back()
    page.locator("#run-view").wait_for(state="hidden")
    page.go_forward()
    page.locator(f"#run-view[data-loaded='{run_id}']").wait_for()
    assert page.get_attribute("#run-view", "data-run") == run_id
    # The list and the run count the same flagged images.
    listed = page.locator(f"#runs-table tr[data-run='{run_id}'] td.flagged").inner_text()
    assert page.inner_text("#flagged-note").startswith(f"{listed} image(s) flagged")


def test_suspect_class_search_offers_all_1000_labels(server: str, page) -> None:
    _open(page, server)
    page.select_option("#model-select", "wide-head")
    page.locator("#model-labels option[value='tabby']").wait_for(state="attached")
    assert page.locator("#model-labels option").count() == 1000
    page.select_option("#source-kind", "folder")
    page.fill("#folder-path", "pets")
    page.select_option("#inject-kind", "demo_tag")
    page.fill("#inject-at", "random")
    page.click("#inject-class")
    page.fill("#inject-class", "tabby")
    page.locator("#plan-list", has_text="suspect class 'tabby'").wait_for()
    _shot(page, "audit-suspect-class-search")
    page.fill("#inject-class", "tabbby")
    page.locator("#plan-error", has_text="tabbby").wait_for()


def test_a_long_audit_asks_before_it_starts(server: str, page) -> None:
    _open(page, server)
    page.select_option("#model-select", "small64")
    page.select_option("#method-select", "occlusion")
    page.fill("#param-patch", "2")
    page.fill("#param-stride", "1")
    page.locator("#plan-cost.warning").wait_for()
    runs_before = page.locator("#runs-table tbody tr").count()
    page.click("#start-button")
    ask = page.locator("#cost-confirm")
    ask.wait_for(state="visible")
    assert "Start it?" in ask.inner_text() and "30" in ask.inner_text()
    _shot(page, "audit-cost-confirmation")
    page.click("#cost-back")
    ask.wait_for(state="hidden")
    assert page.locator("#audit-job").is_hidden()
    assert page.locator("#runs-table tbody tr").count() == runs_before


def test_a_running_audit_after_a_reload_is_cancelled_before_it_is_deleted(server: str, page) -> None:
    _open(page, server)
    page.select_option("#model-select", "slowtile")
    page.select_option("#source-kind", "folder")
    page.fill("#folder-path", "line/week-48")
    page.locator("#plan-list", has_text="12 in 4 class(es)").wait_for()  # measured at full speed: no question
    slow_down(0.5)  # seconds per image in every forward pass from now on
    try:
        page.click("#start-button")
        page.locator("#audit-text", has_text="explaining images").wait_for()
        page.reload()
        page.locator("#audit-text", has_text="explaining images").wait_for()  # followed again
        assert re.search(r"\d+ of 12 images", page.inner_text("#audit-text"))
        page.once("dialog", lambda d: d.accept())
        page.locator("#runs-table tr[data-status='running'] button.danger").click()
        message = page.locator("#runs-message")
        message.wait_for(state="visible")
        assert "cancel it first" in message.inner_text()
        page.wait_for_timeout(1500)  # the list refreshes meanwhile; the sentence stays
        assert message.is_visible() and "cancel it first" in message.inner_text()
        _shot(page, "audit-delete-running")
        page.click("#runs-message-cancel")
        page.locator("#runs-table tr[data-status='cancelled']").wait_for()
    finally:
        slow_down(0)
