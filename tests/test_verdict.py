"""The verdict travels with the run: stored by the audit, shown by runs list/show/compare, the report and the page.

One small folder (two classes of plain tiles, plus a file that is not an image) is audited twice
with the tiny test model: once under a policy that fails (one image could not be read, and the
policy allows none) and once under one that passes. The stored verdicts, their order (failed
checks first), the re-judging of a stored run with ``report --policy`` and the naming of the
unreadable file are checked through the command line and the dashboard's API.
"""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest
from conftest import png_bytes, synthetic_tile

from pellucid.cli import main
from pellucid.core.audit.store import Store

FAILING = """name = "strict gate"
[thresholds]
min_accuracy = 0.0
max_failed_images = 0
"""
PASSING = """name = "lenient gate"
[thresholds]
min_accuracy = 0.0
"""


class _Text(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.parts: list[str] = []

    def handle_data(self, data: str) -> None:
        self.parts.append(data)


def _visible(html: str) -> str:
    p = _Text()
    p.feed(html)
    return " ".join(p.parts)


@pytest.fixture(scope="module")
def audited(tmp_path_factory, tiny_spec):
    root = tmp_path_factory.mktemp("verdict")
    data = root / "data"
    for label, seeds in (("sound", (1, 2, 3)), ("crack", (4, 5, 6))):
        (data / label).mkdir(parents=True)
        for s in seeds:
            (data / label / f"{s}.png").write_bytes(png_bytes(synthetic_tile(seed=s, tagged=label == "crack")))
    (data / "crack" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n cut short")
    (root / "strict.toml").write_text(FAILING, encoding="utf-8")
    (root / "lenient.toml").write_text(PASSING, encoding="utf-8")
    store = root / "store"
    base = ["audit", "--model", str(tiny_spec), "--images", str(data), "--store", str(store), "--quiet"]
    code_fail = main([*base, "--out", str(root / "a"), "--policy", str(root / "strict.toml"), "--fresh"])
    code_pass = main([*base, "--out", str(root / "b"), "--policy", str(root / "lenient.toml"), "--fresh"])
    first = json.loads((root / "a" / "summary.json").read_text())
    second = json.loads((root / "b" / "summary.json").read_text())
    return {"root": root, "store": store, "codes": (code_fail, code_pass), "first": first, "second": second}


def test_the_audit_stores_its_verdict(audited):
    assert audited["codes"] == (1, 0)
    with Store(audited["store"]) as store:
        failed = store.get_run(audited["first"]["run"]["id"])
        passed = store.get_run(audited["second"]["run"]["id"])
    assert failed.verdict == "fail" and passed.verdict == "pass"
    gate = failed.gate
    assert gate["policy"]["name"] == "strict gate"
    assert gate["policy"]["sha256"] and gate["policy"]["path"].endswith("strict.toml")
    # Every check with its value, limit and outcome; failed checks first although the policy lists
    # min_accuracy (which holds) before max_failed_images (which fails). The audit may add checks of
    # its own (for example on confirmed shortcuts); they follow the same order.
    checks = {c["key"]: c for c in gate["checks"]}
    statuses = [c["status"] for c in gate["checks"]]
    assert statuses == sorted(statuses, key=lambda st: st != "fail")
    failed = checks["max_failed_images"]
    assert (failed["status"], failed["measured"], failed["threshold"], failed["comparison"]) == ("fail", 1.0, 0.0, "<=")
    assert checks["min_accuracy"]["status"] == "pass"
    assert [c["key"] for c in gate["checks"]].index("max_failed_images") < [
        c["key"] for c in gate["checks"]].index("min_accuracy")
    assert audited["first"]["gate"]["passed"] is False and audited["first"]["run"]["verdict"] == "fail"


def test_runs_list_show_and_compare_show_the_verdict(audited, capsys):
    store = str(audited["store"])
    a, b = audited["first"]["run"]["id"], audited["second"]["run"]["id"]
    capsys.readouterr()
    assert main(["runs", "list", "--store", store]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert "verdict" in lines[0]
    assert "FAIL" in next(line for line in lines if line.startswith(a))
    assert "PASS" in next(line for line in lines if line.startswith(b))

    assert main(["runs", "show", a, "--store", store]) == 0
    out = capsys.readouterr().out
    assert re.search(r"gate: FAIL — \d+ of \d+ check\(s\) of policy 'strict gate'", out), out
    assert "FAIL run: the number of images that could not be read or audited is 1" in out
    assert "not used: crack/broken.png (reading the folder):" in out

    assert main(["runs", "compare", a, b, "--store", store]) == 0
    out = capsys.readouterr().out
    assert "verdict FAIL ('strict gate'" in out and "→ PASS ('lenient gate'" in out


def test_report_shows_the_stored_verdict_and_rejudges_without_rerunning(audited, capsys):
    root, store = audited["root"], str(audited["store"])
    a = audited["first"]["run"]["id"]
    capsys.readouterr()
    assert main(["report", a, "--store", store, "--out", str(root / "r1"), "--no-pdf"]) == 0
    assert "gate: FAIL" in capsys.readouterr().out
    text = _visible((root / "r1" / "report.html").read_text(encoding="utf-8"))
    assert "Gate: FAIL under policy 'strict gate'" in text and "stored with the run" in text
    assert text.index("max_failed_images") < text.index("min_accuracy")  # failed check first
    assert "Images that could not be used" in text and "crack/broken.png" in text

    assert main(["report", a, "--store", store, "--out", str(root / "r2"), "--no-pdf",
                 "--policy", str(root / "lenient.toml")]) == 0
    assert "gate: PASS" in capsys.readouterr().out
    text = _visible((root / "r2" / "report.html").read_text(encoding="utf-8"))
    assert "Gate: PASS under policy 'lenient gate'" in text and "the audit was not re-run" in text
    assert "Stored with the run: FAIL under policy 'strict gate'" in text
    with Store(audited["store"]) as s:  # re-judging does not rewrite the stored verdict
        assert s.get_run(a).verdict == "fail"


def test_the_dashboard_shows_the_stored_verdict(audited, tiny_spec, tmp_path):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    app = create_app(Settings(models=(str(tiny_spec),), include_bundled=False, data_dir=audited["store"],
                              image_root=audited["root"]))
    a = audited["first"]["run"]["id"]
    with TestClient(app) as client:
        runs = {r["id"]: r for r in client.get("/api/audits/runs").json()["runs"]}
        assert runs[a]["gate"] == "fail" and runs[a]["gate_sentence"].startswith("gate: FAIL")
        detail = client.get(f"/api/audits/runs/{a}").json()
        assert detail["gate"]["checks"][0]["status"] == "fail"
        assert [u["rel"] for u in detail["unreadable"]] == ["crack/broken.png"]
        html = client.get(f"/api/audits/runs/{a}/report.html").text
        assert "Gate: FAIL under policy" in _visible(html)
        diff = client.get("/api/audits/compare", params={"first": a, "second": audited["second"]["run"]["id"]})
        assert diff.json()["gate"]["first"]["passed"] is False and diff.json()["gate"]["second"]["passed"] is True


def test_policy_with_random_places_parses(tmp_path: Path):
    from pellucid.core.audit.policy import load_policy
    from pellucid.core.errors import SpecError

    (tmp_path / "p.toml").write_text('[thresholds]\nmin_accuracy = 0.5\n[injection]\npatch = "x.png"\n'
                                     'suspect_class = "crack"\nat = "random"\nseed = 7\n', encoding="utf-8")
    inj = load_policy(tmp_path / "p.toml").injection
    assert inj.at == "random" and inj.seed == 7
    (tmp_path / "q.toml").write_text('[thresholds]\nmin_accuracy = 0.5\n[injection]\npatch = "x.png"\n'
                                     'suspect_class = "crack"\nat = [1, 2]\nseed = 7\n', encoding="utf-8")
    with pytest.raises(SpecError, match="seed only applies"):
        load_policy(tmp_path / "q.toml")
