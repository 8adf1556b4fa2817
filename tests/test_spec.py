"""Model specs: strict parsing, plain messages."""

from __future__ import annotations

from pathlib import Path

import pytest

from pellucid.core.errors import SpecError
from pellucid.core.model.spec import ModelSpec

BASE = """
name = "m"
[source]
kind = "torchvision"
architecture = "resnet18"
[input]
height = 32
width = 32
[output]
labels = ["a", "b"]
"""


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "spec.toml"
    p.write_text(text)
    return p


def test_minimal_spec_gets_defaults(tmp_path):
    spec = ModelSpec.from_toml(_write(tmp_path, BASE))
    assert spec.input.channels == 3
    assert spec.preprocess.mean == (0.0, 0.0, 0.0) and spec.preprocess.std == (1.0, 1.0, 1.0)
    assert spec.output.kind == "softmax" and spec.output.labels == ("a", "b")
    assert spec.base_dir == tmp_path.resolve()


@pytest.mark.parametrize(
    "text, fragment",
    [
        (BASE + "colour = 1\n", "unknown key(s) colour"),
        (BASE.replace('kind = "torchvision"', 'kind = "keras"'), "kind must be one of"),
        (BASE.replace("height = 32", 'height = "32"'), "height must be a int"),
        (BASE.replace("height = 32", "height = 0"), "between 1 and 8192"),
        (BASE + "[preprocess]\nmean = [0.5]\n", "list of 3 numbers"),
        (BASE + "[preprocess]\nstd = [1, 0, 1]\n", "finite positive"),
        (BASE + "[preprocess]\ninterpolation = \"lanczos\"\n", "interpolation must be one of"),
        (BASE.replace('labels = ["a", "b"]', "labels = []"), "non-empty list"),
        (BASE.replace('architecture = "resnet18"', ""), "needs architecture"),
        ("name = 'm'\n[source]\nkind='torchscript'\n[input]\nheight=1\nwidth=1\n[output]\nlabels=['a']\n",
         "needs weights"),
        ("this is = = not toml", "not valid TOML"),
    ],
)
def test_bad_specs_say_what_is_wrong(tmp_path, text, fragment):
    with pytest.raises(SpecError, match=None) as info:
        ModelSpec.from_toml(_write(tmp_path, text))
    assert fragment in str(info.value)


def test_missing_spec_file(tmp_path):
    with pytest.raises(SpecError, match="does not exist"):
        ModelSpec.from_toml(tmp_path / "nope.toml")


def test_labels_file_relative_to_spec(tmp_path):
    (tmp_path / "labels.txt").write_text("x\ny\n\nz\n")
    spec = ModelSpec.from_toml(_write(tmp_path, BASE.replace('labels = ["a", "b"]', 'labels_file = "labels.txt"')))
    assert spec.output.labels == ("x", "y", "z")
