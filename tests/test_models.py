"""Loading every source kind, fingerprints, and the checks that parts of a model agree."""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import pytest
import torch
import torchvision
from safetensors.torch import save_file
from torch import nn

from pellucid.core.errors import ModelLoadError, ModelOutputError
from pellucid.core.model.loading import load_model
from pellucid.core.model.spec import ModelSpec
from pellucid.core.views.probe import Probe, count_hooks

LABELS = '["a", "b", "c"]'


def small_net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, 3))


class TupleNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.body = small_net()

    def forward(self, x):
        return {"features": x.mean(), "logits": self.body(x)}


def build_small() -> nn.Module:
    return small_net()


def build_flat() -> nn.Module:
    return nn.Sequential(nn.Flatten(), nn.Linear(3 * 16 * 16, 3))


def build_tuple() -> nn.Module:
    return TupleNet()


def build_nan() -> nn.Module:
    net = small_net()
    with torch.no_grad():
        net[4].bias.fill_(float("nan"))
    return net


def spec_file(tmp_path: Path, source: str, *, labels: str = LABELS, size: int = 16) -> Path:
    p = tmp_path / "spec.toml"
    p.write_text(f'name = "t"\n[source]\n{source}\n[input]\nheight = {size}\nwidth = {size}\n'
                 f"[output]\nlabels = {labels}\n")
    return p


def test_torchvision_architecture_with_safetensors_and_pt(tmp_path):
    net = torchvision.models.resnet18(num_classes=3)
    save_file(net.state_dict(), str(tmp_path / "w.safetensors"))
    torch.save(net.state_dict(), tmp_path / "w.pt")
    for name in ("w.safetensors", "w.pt"):
        spec = spec_file(tmp_path, f'kind = "torchvision"\narchitecture = "resnet18"\n'
                                   f'arguments = {{ num_classes = 3 }}\nweights = "{name}"', size=64)
        m = load_model(spec)
        assert m.fingerprint == hashlib.sha256((tmp_path / name).read_bytes()).hexdigest()
        x = torch.randn(1, 3, 64, 64)
        net.eval()
        with torch.inference_mode():
            assert torch.equal(m.module(x), net(x))


def test_state_dict_for_wrong_architecture_lists_keys(tmp_path):
    torch.save(torchvision.models.resnet18(num_classes=3).state_dict(), tmp_path / "w.pt")
    spec = spec_file(tmp_path, 'kind = "torchvision"\narchitecture = "vgg11"\narguments = { num_classes = 3 }\n'
                               'weights = "w.pt"', size=64)
    with pytest.raises(ModelLoadError, match=r"missing keys \(\d+\).*unexpected keys \(\d+\)"):
        load_model(spec)


def test_wrong_num_classes_names_the_tensor(tmp_path):
    torch.save(torchvision.models.resnet18(num_classes=5).state_dict(), tmp_path / "w.pt")
    spec = spec_file(tmp_path, 'kind = "torchvision"\narchitecture = "resnet18"\narguments = { num_classes = 3 }\n'
                               'weights = "w.pt"', size=64)
    with pytest.raises(ModelLoadError, match=r"fc.weight has shape \(5, 512\)"):
        load_model(spec)


def test_missing_and_garbage_weights(tmp_path):
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_small"\nweights = "none.pt"')
    with pytest.raises(ModelLoadError, match="does not exist"):
        load_model(spec)
    (tmp_path / "none.pt").write_bytes(b"\x00\x01 random bytes, not a state dict" * 10)
    with pytest.raises(ModelLoadError, match="not a readable state_dict"):
        load_model(spec)


def test_factory_without_weights_fingerprints_the_state(tmp_path):
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_small"')
    a, b = load_model(spec), load_model(spec)
    assert a.fingerprint == b.fingerprint and len(a.fingerprint) == 64
    assert any("no weights file" in n for n in a.notes)


def test_label_count_must_match_logits(tmp_path):
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_small"', labels='["a", "b"]')
    with pytest.raises(ModelLoadError, match="gives 3 outputs but its spec lists 2 labels"):
        load_model(spec)


def test_wrong_input_size_is_a_plain_error(tmp_path):
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_flat"', size=8)
    with pytest.raises(ModelLoadError, match="failed on a 3×8×8 test input"):
        load_model(spec)


def test_dict_output_is_reduced_to_the_named_tensor(tmp_path):
    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_tuple"\noutput_key = "logits"')
    m = load_model(spec)
    out = m.module(torch.zeros(1, 3, 16, 16))
    assert out.shape == (1, 3)
    assert any("'logits'" in n for n in m.notes)


def test_nan_outputs_are_refused_at_prediction(tmp_path):
    from pellucid.core.views.predict import predict

    m = load_model(spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_nan"'))
    with pytest.raises(ModelOutputError, match="NaN or infinite"):
        predict(m.module, torch.zeros(1, 3, 16, 16), labels=m.labels)


def test_export_archive_keeps_module_tree_for_hooks(tmp_path):
    net = small_net().eval()
    program = torch.export.export(net, (torch.zeros(1, 3, 16, 16),))
    torch.export.save(program, str(tmp_path / "m.pt2"))
    m = load_model(spec_file(tmp_path, 'kind = "export"\nweights = "m.pt2"'))
    assert m.supports_hooks
    x = torch.randn(1, 3, 16, 16)
    with Probe(m.module, ["0"]) as probe:
        out = m.module(x)
    assert probe.outputs["0"].shape == (1, 4, 16, 16)
    assert torch.allclose(out, net(x), atol=1e-6)
    assert count_hooks(m.module) == 0


def test_torchscript_loads_without_layer_views(tmp_path):
    from pellucid.core.errors import UnsupportedLayerError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)  # torch marks TorchScript deprecated; users still have archives
        torch.jit.script(small_net().eval()).save(str(tmp_path / "m.ts"))
    m = load_model(spec_file(tmp_path, 'kind = "torchscript"\nweights = "m.ts"'))
    assert not m.supports_hooks
    assert any("torch.export" in n for n in m.notes)
    with pytest.raises(UnsupportedLayerError, match="forward hooks"):
        Probe(m.module, ["0"])


def test_pickled_module_needs_the_trust_flag(tmp_path):
    torch.save(small_net(), tmp_path / "whole.pt")
    spec = spec_file(tmp_path, 'kind = "pickled"\nweights = "whole.pt"')
    with pytest.raises(ModelLoadError, match="runs whatever code the file contains"):
        load_model(spec)
    assert load_model(spec, trust_pickled=True).module(torch.zeros(1, 3, 16, 16)).shape == (1, 3)


def test_class_index_by_label_and_range(tmp_path):
    from pellucid.core.errors import BadParameterError

    m = load_model(spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_small"'))
    assert m.class_index("b") == 1 and m.class_index(2) == 2 and m.class_index("0") == 0
    with pytest.raises(BadParameterError, match="unknown class 'zebra'"):
        m.class_index("zebra")
    with pytest.raises(BadParameterError, match="out of range"):
        m.class_index(3)


def test_spec_roundtrip_dict(tmp_path):
    spec = ModelSpec.from_toml(spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_small"'))
    d = spec.to_dict()
    assert d["source"]["factory"].endswith(":build_small") and d["input"]["height"] == 16
