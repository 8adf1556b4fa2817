"""Loading every source kind, fingerprints, and the checks that parts of a model agree."""

from __future__ import annotations

import hashlib
import warnings
from pathlib import Path

import numpy as np
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


def test_nan_outputs_are_refused_at_load_and_at_prediction(tmp_path):
    from pellucid.core.views.predict import predict

    with pytest.raises(ModelLoadError, match="returns NaN or infinite logits") as info:
        load_model(spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_nan"'))
    assert len(str(info.value).splitlines()) == 1
    with pytest.raises(ModelOutputError, match="NaN or infinite"):
        predict(build_nan(), torch.zeros(1, 3, 16, 16), labels=["a", "b", "c"])


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


# --- fingerprints, seeds and factory lookup ----------------------------------------------------------------

FACTORY_SOURCE = '''
from torch import nn


def build(num_classes: int = 3) -> nn.Module:
    return nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(4, num_classes))
'''


def _documented_factory_fingerprint(weights: Path, factory: str, source: Path, arguments: str) -> str:
    # The rule written in README.md ("Fingerprints") and core/model/loading.py, recomputed here by hand.
    text = "\n".join(["pellucid-factory-fingerprint/1", f"weights {hashlib.sha256(weights.read_bytes()).hexdigest()}",
                      f"factory {factory}", f"source {hashlib.sha256(source.read_bytes()).hexdigest()}",
                      f"arguments {arguments}"]) + "\n"
    return hashlib.sha256(text.encode()).hexdigest()


def _factory_folder(folder: Path, module: str, source: str = FACTORY_SOURCE) -> Path:
    """A spec folder with its own factory module beside spec.toml (not on sys.path) and weights."""
    import importlib.util
    import sys

    folder.mkdir(parents=True, exist_ok=True)
    (folder / f"{module}.py").write_text(source, encoding="utf-8")
    spec = importlib.util.spec_from_file_location(f"_scratch_{module}", folder / f"{module}.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    torch.manual_seed(1)
    save_file(mod.build().state_dict(), str(folder / "w.safetensors"))
    sys.modules.pop(module, None)
    p = folder / "spec.toml"
    p.write_text(f'name = "t"\n[source]\nkind = "factory"\nfactory = "{module}:build"\nweights = "w.safetensors"\n'
                 f'arguments = {{ num_classes = 3 }}\n[input]\nheight = 16\nwidth = 16\n[output]\nlabels = {LABELS}\n')
    return p


def test_factory_module_is_found_beside_the_spec_and_fingerprinted_with_its_source(tmp_path):
    import sys

    path_before = list(sys.path)
    spec = _factory_folder(tmp_path / "model", "beside_spec_net")
    m = load_model(spec)
    assert sys.path == path_before  # the spec's folder was on sys.path only while importing
    expected = _documented_factory_fingerprint(tmp_path / "model" / "w.safetensors", "beside_spec_net:build",
                                               tmp_path / "model" / "beside_spec_net.py", '{"num_classes": 3}')
    assert m.fingerprint == expected
    assert m.fingerprint != hashlib.sha256((tmp_path / "model" / "w.safetensors").read_bytes()).hexdigest()
    assert "factory source" in m.summary()["fingerprint_covers"]

    # Same weights, changed factory code (the head now halves the logits): a different model, a different print.
    (tmp_path / "model" / "beside_spec_net.py").write_text(
        FACTORY_SOURCE.replace("nn.Linear(4, num_classes))", "nn.Linear(4, num_classes), nn.Hardtanh(-0.5, 0.5))"),
        encoding="utf-8")
    sys.modules.pop("beside_spec_net", None)
    changed = load_model(spec)
    assert changed.fingerprint != m.fingerprint


def test_two_specs_with_the_same_module_name_get_their_own_factories(tmp_path):
    a = load_model(_factory_folder(tmp_path / "a", "same_name_net"))
    b = load_model(_factory_folder(tmp_path / "b", "same_name_net",
                                   FACTORY_SOURCE.replace("nn.Conv2d(3, 4, 3", "nn.Conv2d(3, 4, 5")))
    assert a.module[0].kernel_size == (3, 3) and b.module[0].kernel_size == (5, 5)


def test_missing_factory_module_says_where_it_looked(tmp_path):
    spec = spec_file(tmp_path, 'kind = "factory"\nfactory = "no_such_module_anywhere:build"')
    with pytest.raises(ModelLoadError, match="looked in the spec's folder"):
        load_model(spec)


def test_torchvision_without_weights_is_seeded_and_says_so(tmp_path):
    src = 'kind = "torchvision"\narchitecture = "resnet18"\narguments = { num_classes = 3 }'
    a = load_model(spec_file(tmp_path, src, size=32))
    b = load_model(spec_file(tmp_path, src, size=32))
    c = load_model(spec_file(tmp_path, src + "\nseed = 7", size=32))
    assert a.fingerprint == b.fingerprint != c.fingerprint
    x = torch.randn(1, 3, 32, 32)
    with torch.inference_mode():
        assert torch.equal(a.module(x), b.module(x))
    assert any("seed 0" in n and "random initial weights" in n for n in a.notes)
    # torch's global generator is left as it was
    torch.manual_seed(123)
    expected = torch.rand(3)
    torch.manual_seed(123)
    load_model(spec_file(tmp_path, src, size=32))
    assert torch.equal(torch.rand(3), expected)


@pytest.mark.parametrize("argument", ['weights = "IMAGENET1K_V1"', "pretrained = true"])
def test_arguments_that_would_fetch_weights_are_refused(tmp_path, argument):
    spec = spec_file(tmp_path, f'kind = "torchvision"\narchitecture = "resnet18"\narguments = {{ {argument} }}',
                     size=32)
    with pytest.raises(ModelLoadError, match="never downloads weights"):
        load_model(spec)


# --- export archives traced at batch 1, TorchScript capabilities --------------------------------------------


class ViewNet(nn.Module):
    """Flattens with x.view(x.size(0), -1): torch.export at batch 1 bakes the batch size into the graph."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.pool = nn.AdaptiveAvgPool2d(2)
        self.head = nn.Linear(16, 3)

    def forward(self, x):
        y = self.pool(torch.relu(self.conv(x)))
        return self.head(y.view(x.size(0), -1))


def test_export_archive_with_batch_fixed_at_one_runs_every_method(tmp_path):
    from pellucid.core.attribution import Normalization, compute_attribution, method_names
    from pellucid.core.occlusion.engine import occlusion_map

    net = ViewNet().eval()
    torch.export.save(torch.export.export(net, (torch.zeros(1, 3, 16, 16),)), str(tmp_path / "m.pt2"))
    m = load_model(spec_file(tmp_path, 'kind = "export"\nweights = "m.pt2"'))
    assert m.batch_fixed and m.summary()["batch_fixed"] is True
    assert any("batch fixed at 1" in n for n in m.notes)
    x = torch.randn(5, 3, 16, 16)
    with torch.inference_mode():
        assert torch.allclose(m.module(x), net(x), atol=1e-6)  # a batch of 5, one image at a time
    one = x[:1]
    # Every registered method runs (small settings keep it quick); occlusion agrees with the eager model.
    small = {"rise": {"masks": 16}, "smoothgrad": {"samples": 4}, "integrated_gradients": {"steps": 8},
             "occlusion": {"patch": 4, "stride": 4}}
    for name in method_names():
        amap = compute_attribution(name, m.module, one, params=small.get(name),
                                   normalization=Normalization.of((0.0, 0.0, 0.0), (1.0, 1.0, 1.0)))
        assert amap.map.shape == (16, 16) and np.isfinite(amap.map).all(), name
    ours = occlusion_map(m.module, one, target=0, patch=4, stride=4, method="auto").drop
    ref = occlusion_map(net, one, target=0, patch=4, stride=4, method="naive").drop
    assert np.allclose(ours, ref, atol=1e-5)


def test_export_archive_with_a_dynamic_batch_is_not_looped(tmp_path):
    net = small_net().eval()
    batch = torch.export.Dim("batch", min=1, max=1024)
    program = torch.export.export(net, (torch.zeros(2, 3, 16, 16),), dynamic_shapes=({0: batch},))
    torch.export.save(program, str(tmp_path / "m.pt2"))
    m = load_model(spec_file(tmp_path, 'kind = "export"\nweights = "m.pt2"'))
    assert not m.batch_fixed and m.summary()["batch"] == "any size"


def test_torchscript_refuses_hook_methods_up_front_and_runs_the_others(tmp_path):
    from pellucid.core.attribution import check_request, compute_attribution
    from pellucid.core.errors import BadParameterError

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        torch.jit.script(small_net().eval()).save(str(tmp_path / "m.ts"))
    m = load_model(spec_file(tmp_path, 'kind = "torchscript"\nweights = "m.ts"'))
    for call in (lambda: check_request("gradcam", m.module, m.input_shape, {}),
                 lambda: compute_attribution("gradcam", m.module, torch.zeros(1, 3, 16, 16))):
        with pytest.raises(BadParameterError, match="unavailable for TorchScript: needs forward hooks"):
            call()
    amap = compute_attribution("saliency", m.module, torch.randn(1, 3, 16, 16))
    assert np.abs(amap.map).sum() > 0


def test_server_refuses_a_nan_model_with_the_same_sentence(tmp_path):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    spec = spec_file(tmp_path, f'kind = "factory"\nfactory = "{__name__}:build_nan"')
    with pytest.raises(ModelLoadError) as info:
        load_model(spec)
    settings = Settings(models=(str(spec),), include_bundled=False, data_dir=tmp_path / "data")
    with TestClient(create_app(settings)) as client:
        r = client.get("/api/models/t")
    assert r.status_code == 422
    assert r.json()["detail"] == str(info.value)


class ReshapeToOne(nn.Module):
    """reshape(1, -1) in forward: a TorchScript trace of it only takes a batch of 1."""

    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.conv = nn.Conv2d(3, 4, 3, padding=1)
        self.head = nn.Linear(4 * 16 * 16, 3)

    def forward(self, x):
        return self.head(torch.relu(self.conv(x)).reshape(1, -1))


def test_torchscript_traced_at_batch_one_runs_one_image_at_a_time(tmp_path):
    net = ReshapeToOne().eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # tracer and deprecation warnings
        torch.jit.trace(net, torch.zeros(1, 3, 16, 16)).save(str(tmp_path / "m.ts"))
    m = load_model(spec_file(tmp_path, 'kind = "torchscript"\nweights = "m.ts"'))
    assert m.batch_fixed and not m.supports_hooks
    x = torch.randn(4, 3, 16, 16)
    with torch.inference_mode():
        assert torch.allclose(m.module(x), torch.cat([net(x[i : i + 1]) for i in range(4)]), atol=1e-6)
