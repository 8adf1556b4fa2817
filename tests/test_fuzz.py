"""Fuzzing the JSON API from its own OpenAPI schema (schemathesis, in-process over ASGI).

Every operation gets a bounded, reproducible number of generated requests (derandomised, at most
15 examples each). Two checks: no 5xx response, and every response conforms to the schema the
API publishes for it. The app runs its lifespan (a TestClient block) so the workspace exists; it
serves the tiny test model with an image folder, and one image is opened first so that some
generated requests reach past the 404s.

The operations are driven with plain Hypothesis ``@given`` over each operation's strategy
(schemathesis's own pytest plugin does not load under this pytest version).
"""

from __future__ import annotations

from importlib.metadata import version

import pytest

schemathesis = pytest.importorskip("schemathesis")

from hypothesis import HealthCheck, given, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import response_schema_conformance

MAX_EXAMPLES = 15


@pytest.fixture(scope="module")
def fuzz_app(tiny_spec, image_folder, tmp_path_factory):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    settings_ = Settings(models=(str(tiny_spec),), include_bundled=False, image_root=image_folder,
                         data_dir=tmp_path_factory.mktemp("fuzz-data"), max_upload_bytes=200_000, job_workers=1)
    app = create_app(settings_)
    with TestClient(app) as client:
        assert client.post("/api/samples/open", json={"model": "tiny", "name": "tile-0.png"}).status_code == 200
        yield app


def _fuzz(operation) -> tuple[int, list[str]]:
    calls: list[int] = []
    failures: list[str] = []

    @given(case=operation.as_strategy())
    @settings(max_examples=MAX_EXAMPLES, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    def run(case) -> None:
        calls.append(1)
        try:
            case.call_and_validate(checks=[not_a_server_error, response_schema_conformance])
        except Exception as exc:
            failures.append(f"{operation.label}: {type(exc).__name__}: {str(exc)[:600]}")
            raise

    try:
        run()
    except (Exception, BaseExceptionGroup):
        if not failures:
            raise
    return len(calls), failures


def test_api_conforms_to_its_schema(fuzz_app) -> None:
    schema = schemathesis.openapi.from_asgi("/openapi.json", fuzz_app)
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 15, [op.label for op in operations]
    counts: dict[str, int] = {}
    failures: list[str] = []
    for operation in operations:
        n, failed = _fuzz(operation)
        counts[operation.label] = n
        failures += failed[:1]
    print(f"schemathesis {version('schemathesis')}: "
          f"{sum(counts.values())} cases over {len(counts)} operations")
    for label, n in counts.items():
        print(f"  {n:3d}  {label}")
    assert not failures, "\n\n".join(failures)
