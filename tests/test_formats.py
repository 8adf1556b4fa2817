"""Model files teams hand over: ONNX and timm architectures load, and a wrong kind names the right one.

ONNX models are checked against ONNX Runtime, the ONNX project's own runtime, on the same input;
timm models against timm's own module; the file sniffing against the layouts the savers write.
"""

from __future__ import annotations

import contextlib
import io
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from safetensors.torch import save_file
from torch import nn

from pellucid.core.errors import ModelLoadError
from pellucid.core.model.loading import load_model

LABELS = '["a", "b", "c", "d"]'


def spec_file(folder: Path, source: str, *, size: int = 32, name: str = "spec.toml") -> Path:
    p = folder / name
    p.write_text(f'name = "m"\n[source]\n{source}\n[input]\nheight = {size}\nwidth = {size}\n'
                 f"[output]\nlabels = {LABELS}\n")
    return p


class SmallCNN(nn.Module):
    """Conv + batch norm + max pool, an average pool, a flatten and a linear head: the usual CNN operators."""

    def __init__(self) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 8, 3, padding=1)
        self.bn1 = nn.BatchNorm2d(8)
        self.pool = nn.MaxPool2d(2)
        self.conv2 = nn.Conv2d(8, 16, 3, stride=2, padding=1, bias=False)
        self.avg = nn.AvgPool2d(2)
        self.head = nn.Linear(16 * 4 * 4, 4)

    def forward(self, x):
        y = self.pool(torch.relu(self.bn1(self.conv1(x))))
        y = self.avg(torch.nn.functional.hardswish(self.conv2(y)))
        return self.head(torch.flatten(y, 1))


def _small_cnn() -> nn.Module:
    torch.manual_seed(0)
    net = SmallCNN()
    with torch.no_grad():  # running statistics that are not the identity, so folding them is checked
        net.bn1.running_mean.uniform_(-0.5, 0.5)
        net.bn1.running_var.uniform_(0.5, 2.0)
    return net.eval()


def _export_onnx(net: nn.Module, path: Path, *, size: int, dynamo: bool) -> None:
    """torch.onnx.export with a free batch dimension, both exporters torch 2.14 ships (offline)."""
    x = torch.zeros(1, 3, size, size)
    with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()):
        warnings.simplefilter("ignore")  # the TorchScript-based exporter announces its deprecation
        if dynamo:
            torch.onnx.export(net, (x,), str(path), dynamo=True,
                              dynamic_shapes=({0: torch.export.Dim("batch", min=1, max=1024)},))
        else:
            torch.onnx.export(net, (x,), str(path), dynamo=False, input_names=["x"],
                              dynamic_axes={"x": {0: "batch"}})


def _onnxruntime_logits(path: Path, x: torch.Tensor) -> np.ndarray:
    ort = pytest.importorskip("onnxruntime")
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return session.run(None, {session.get_inputs()[0].name: x.numpy()})[0]


@pytest.mark.parametrize("dynamo", [True, False], ids=["export-based", "torchscript-based"])
def test_onnx_small_cnn_matches_onnxruntime_and_supports_hooks_and_gradcam(tmp_path, dynamo):
    pytest.importorskip("onnx")
    from pellucid.core.attribution import compute_attribution
    from pellucid.core.model.layers import layer_map
    from pellucid.core.views.probe import Probe, count_hooks

    net = _small_cnn()
    _export_onnx(net, tmp_path / "m.onnx", size=32, dynamo=dynamo)
    m = load_model(spec_file(tmp_path, 'kind = "onnx"\nweights = "m.onnx"'))
    assert m.supports_hooks and not m.batch_fixed

    x = torch.randn(3, 3, 32, 32, generator=torch.Generator().manual_seed(1))
    # Source: ONNX Runtime (the onnxruntime package), the ONNX project's reference runtime, on the same input.
    ref = _onnxruntime_logits(tmp_path / "m.onnx", x)
    with torch.inference_mode():
        ours = m.module(x).numpy()
    assert np.abs(ours - ref).max() <= 1e-4

    # The rebuilt graph has real layers: the layer map lists both convolutions, hooks see them and go away.
    lmap = layer_map(m.module, input_shape=m.input_shape)
    convs = [row.name for row in lmap.rows if row.type == "Conv2d"]
    assert len(convs) == 2
    with Probe(m.module, [convs[0]]) as probe:
        m.module(x[:1])
    assert tuple(probe.outputs[convs[0]].shape) == (1, 8, 32, 32)
    assert count_hooks(m.module) == 0

    # Gradients flow to the input and Grad-CAM finds a default layer.
    amap = compute_attribution("gradcam", m.module, x[:1])
    assert amap.map.shape == (32, 32) and np.isfinite(amap.map).all() and amap.map.max() > 0
    grad = compute_attribution("saliency", m.module, x[:1])
    assert np.abs(grad.map).sum() > 0


@pytest.mark.slow
def test_onnx_torchvision_mobilenet_matches_onnxruntime(tmp_path):
    pytest.importorskip("onnx")
    torch.manual_seed(0)
    net = torchvision.models.mobilenet_v3_small(num_classes=4).eval()
    _export_onnx(net, tmp_path / "m.onnx", size=64, dynamo=True)
    m = load_model(spec_file(tmp_path, 'kind = "onnx"\nweights = "m.onnx"', size=64))
    x = torch.randn(2, 3, 64, 64, generator=torch.Generator().manual_seed(2))
    # Source: ONNX Runtime (the onnxruntime package) on the same input.
    ref = _onnxruntime_logits(tmp_path / "m.onnx", x)
    with torch.inference_mode():
        assert np.abs(m.module(x).numpy() - ref).max() <= 1e-4
    # Layers keep torchvision's names, taken from the exporter's weight names.
    names = dict(m.module.named_modules())
    assert "features.0.0" in names and isinstance(names["features.0.0"], nn.Conv2d)


def test_onnx_operator_outside_the_supported_set_is_named(tmp_path):
    onnx = pytest.importorskip("onnx")
    from onnx import TensorProto, helper

    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["c"], kernel_shape=[1, 1]),
         helper.make_node("NonMaxSuppression", ["c", "c"], ["y"])],
        "g", [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["n", 3, 8, 8])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, None)],
        [helper.make_tensor("w", TensorProto.FLOAT, [4, 3, 1, 1], np.ones(12, dtype=np.float32))],
    )
    onnx.save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), str(tmp_path / "m.onnx"))
    with pytest.raises(ModelLoadError, match="NonMaxSuppression") as info:
        load_model(spec_file(tmp_path, 'kind = "onnx"\nweights = "m.onnx"', size=8))
    assert "kind = \"export\"" in str(info.value)


def test_timm_architecture_with_the_users_own_weights(tmp_path, monkeypatch):
    timm = pytest.importorskip("timm")
    # No hub: any attempt to reach the network in this test fails loudly.
    monkeypatch.setenv("HF_HUB_OFFLINE", "1")
    torch.manual_seed(3)
    net = timm.create_model("resnet10t", pretrained=False, num_classes=4).eval()
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(tmp_path / "w.safetensors"))
    spec = spec_file(tmp_path, 'kind = "timm"\narchitecture = "resnet10t"\narguments = { num_classes = 4 }\n'
                               'weights = "w.safetensors"', size=64)
    m = load_model(spec)
    x = torch.randn(2, 3, 64, 64)
    with torch.inference_mode():
        # Source: timm's own module with the same state_dict (reference computed by the library itself).
        assert torch.allclose(m.module(x), net(x), atol=1e-6)
    assert m.supports_hooks and not m.batch_fixed


def test_timm_unknown_architecture_and_pretrained_flag_are_plain_errors(tmp_path):
    pytest.importorskip("timm")
    with pytest.raises(ModelLoadError, match="timm has no architecture named 'resnet10x'"):
        load_model(spec_file(tmp_path, 'kind = "timm"\narchitecture = "resnet10x"'))
    with pytest.raises(ModelLoadError, match="never downloads weights"):
        load_model(spec_file(tmp_path, 'kind = "timm"\narchitecture = "resnet10t"\n'
                                       'arguments = { pretrained = true, num_classes = 4 }'))


# --- a wrong kind for a file ---------------------------------------------------------------------------------


def _net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, 4)).eval()


def build_net() -> nn.Module:
    return _net()


@pytest.fixture(scope="module")
def saved(tmp_path_factory) -> dict[str, Path]:
    """One file of each format, written by the library that defines it."""
    d = tmp_path_factory.mktemp("formats")
    net = _net()
    files = {"state_dict": d / "sd.pt", "safetensors": d / "w.safetensors", "torchscript": d / "m.ts",
             "export": d / "m.pt2", "pickled": d / "whole.pt"}
    torch.save(net.state_dict(), files["state_dict"])
    save_file(net.state_dict(), str(files["safetensors"]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        torch.jit.script(net).save(str(files["torchscript"]))
    torch.export.save(torch.export.export(net, (torch.zeros(1, 3, 8, 8),)), str(files["export"]))
    torch.save(net, files["pickled"])
    try:
        import onnx  # noqa: F401

        files["onnx"] = d / "m.onnx"
        _export_onnx(net, files["onnx"], size=8, dynamo=False)
    except ImportError:
        pass
    return files


# (file, kind given in the spec, the kind the message must name)
# Source for the layouts: PyTorch documentation of torch.save (zip with data.pkl), torch.jit.save (code/ and
# constants.pkl), torch.export.save (.pt2 with archive_format); safetensors format documentation (8-byte
# header length, JSON header); onnx.proto (ModelProto starts with ir_version, field 1).
WRONG_KINDS = [
    ("torchscript", "factory", "torchscript"),
    ("torchscript", "torchvision", "torchscript"),
    ("state_dict", "torchscript", "factory"),
    ("safetensors", "torchscript", "factory"),
    ("safetensors", "export", "factory"),
    ("export", "factory", "export"),
    ("export", "torchscript", "export"),
    ("torchscript", "export", "torchscript"),
    ("pickled", "factory", "pickled"),
    ("state_dict", "pickled", "factory"),
    ("onnx", "factory", "onnx"),
    ("onnx", "torchscript", "onnx"),
    ("torchscript", "onnx", "torchscript"),
]


@pytest.mark.parametrize("fmt, kind, right", WRONG_KINDS)
def test_a_file_of_another_kind_gets_a_message_naming_the_right_kind(tmp_path, saved, fmt, kind, right):
    if fmt not in saved:
        pytest.skip("onnx is not installed")
    extra = {"factory": f'factory = "{__name__}:build_net"\n', "torchvision": 'architecture = "resnet18"\n'}
    spec = spec_file(tmp_path, f'kind = "{kind}"\n{extra.get(kind, "")}weights = "{saved[fmt]}"', size=8)
    with pytest.raises(ModelLoadError) as info:
        load_model(spec, trust_pickled=True)
    msg = str(info.value)
    assert f'kind = "{right}"' in msg, msg
    assert len(msg.splitlines()) == 1
    for boilerplate in ("corrupted", "weights_only", "Unpickler", "Traceback", "pytorch.org"):
        assert boilerplate not in msg


def test_sniffing_reads_each_format(saved):
    from pellucid.core.model.formats import sniff

    expected = {"state_dict": "state_dict", "safetensors": "safetensors", "torchscript": "torchscript",
                "export": "export", "pickled": "pickled_module", "onnx": "onnx"}
    for fmt, path in saved.items():
        assert sniff(path) == expected[fmt], fmt


def test_right_kinds_still_load(tmp_path, saved):
    for kind, fmt in (("factory", "state_dict"), ("factory", "safetensors"), ("torchscript", "torchscript"),
                      ("export", "export")):
        extra = f'factory = "{__name__}:build_net"\n' if kind == "factory" else ""
        m = load_model(spec_file(tmp_path, f'kind = "{kind}"\n{extra}weights = "{saved[fmt]}"', size=8))
        assert m.num_classes == 4


def test_garbage_weights_say_so_in_one_line(tmp_path):
    (tmp_path / "junk.pt").write_bytes(b"\x00\x01 neither zip nor pickle " * 20)
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_net"\nweights = "junk.pt"', size=8)
    with pytest.raises(ModelLoadError, match="not a readable state_dict") as info:
        load_model(spec)
    assert len(str(info.value).splitlines()) == 1 and "weights_only" not in str(info.value)
