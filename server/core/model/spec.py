"""Model specs: a small TOML file saying how to load a model and how to feed it.

A spec is parsed strictly: unknown keys and wrong types are errors, because a silently ignored
preprocessing key is the most common source of wrong maps. Paths are resolved relative to the
spec file. See README.md ("Model specs") for the format.
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pellucid.core.errors import SpecError

SOURCE_KINDS = ("torchvision", "timm", "onnx", "factory", "export", "torchscript", "pickled")
OUTPUT_KINDS = ("softmax", "sigmoid")
INTERPOLATIONS = ("nearest", "bilinear", "bicubic")
BUILTIN_LABELS = ("imagenet-1k",)


@dataclass(frozen=True)
class SourceSpec:
    kind: str
    architecture: str | None = None
    factory: str | None = None
    arguments: dict[str, Any] = field(default_factory=dict)
    weights: str | None = None
    output_key: str | None = None
    seed: int = 0  # seeds torch while the architecture or factory builds (random initial weights are reproducible)


@dataclass(frozen=True)
class InputSpec:
    height: int
    width: int
    channels: int = 3


@dataclass(frozen=True)
class PreprocessSpec:
    resize: tuple[int, ...] | None = None  # (side,) = shorter side; (h, w) = exact size
    crop: tuple[int, int] | None = None
    mean: tuple[float, ...] = (0.0, 0.0, 0.0)
    std: tuple[float, ...] = (1.0, 1.0, 1.0)
    interpolation: str = "bilinear"


@dataclass(frozen=True)
class OutputSpec:
    kind: str = "softmax"
    labels: tuple[str, ...] = ()
    builtin: str | None = None


@dataclass(frozen=True)
class ModelSpec:
    name: str
    source: SourceSpec
    input: InputSpec
    preprocess: PreprocessSpec
    output: OutputSpec
    description: str = ""
    card: str | None = None
    base_dir: Path = Path(".")
    path: Path | None = None

    @classmethod
    def from_toml(cls, path: str | Path) -> ModelSpec:
        path = Path(path)
        if not path.is_file():
            raise SpecError(f"model spec {str(path)!r} does not exist or is not a file")
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise SpecError(f"model spec {str(path)!r} is not valid TOML: {exc}") from None
        return cls.from_dict(data, base_dir=path.resolve().parent, path=path.resolve())

    @classmethod
    def from_dict(cls, data: dict[str, Any], *, base_dir: Path, path: Path | None = None) -> ModelSpec:
        where = str(path) if path else "model spec"
        _only_keys(data, {"name", "description", "card", "source", "input", "preprocess", "output"}, where)
        name = _typed(data, "name", str, where, required=True)
        if not name or not all(c.isalnum() or c in "-_." for c in name):
            raise SpecError(f"{where}: name must be letters, digits, '-', '_' or '.', got {name!r}")

        src = _table(data, "source", where, required=True)
        _only_keys(src, {"kind", "architecture", "factory", "arguments", "weights", "output_key", "seed"},
                   f"{where} [source]")
        kind = _typed(src, "kind", str, f"{where} [source]", required=True)
        if kind not in SOURCE_KINDS:
            raise SpecError(f"{where} [source]: kind must be one of {', '.join(SOURCE_KINDS)}, got {kind!r}")
        source = SourceSpec(
            kind=kind,
            architecture=_typed(src, "architecture", str, f"{where} [source]"),
            factory=_typed(src, "factory", str, f"{where} [source]"),
            arguments=dict(_typed(src, "arguments", dict, f"{where} [source]") or {}),
            weights=_typed(src, "weights", str, f"{where} [source]"),
            output_key=_typed(src, "output_key", str, f"{where} [source]"),
            seed=_seed(src, f"{where} [source]"),
        )
        if kind == "torchvision" and not source.architecture:
            raise SpecError(f"{where} [source]: kind 'torchvision' needs architecture = \"resnet18\" or similar")
        if kind == "timm" and not source.architecture:
            raise SpecError(f"{where} [source]: kind 'timm' needs architecture = \"resnet18\" or another timm name")
        if kind == "factory" and not source.factory:
            raise SpecError(f"{where} [source]: kind 'factory' needs factory = \"package.module:function\"")
        if kind in ("onnx", "export", "torchscript", "pickled") and not source.weights:
            raise SpecError(f"{where} [source]: kind {kind!r} needs weights = \"path to the archive\"")

        inp = _table(data, "input", where, required=True)
        _only_keys(inp, {"height", "width", "channels"}, f"{where} [input]")
        input_spec = InputSpec(
            height=_positive_int(inp, "height", f"{where} [input]", required=True),
            width=_positive_int(inp, "width", f"{where} [input]", required=True),
            channels=_positive_int(inp, "channels", f"{where} [input]") or 3,
        )
        if input_spec.channels not in (1, 3):
            raise SpecError(f"{where} [input]: channels must be 1 or 3, got {input_spec.channels}")

        pre = _table(data, "preprocess", where)
        _only_keys(pre, {"resize", "crop", "mean", "std", "interpolation"}, f"{where} [preprocess]")
        c = input_spec.channels
        preprocess = PreprocessSpec(
            resize=_size(pre, "resize", f"{where} [preprocess]", allow_single=True),
            crop=_size(pre, "crop", f"{where} [preprocess]", allow_single=False),  # type: ignore[arg-type]
            mean=_floats(pre, "mean", c, f"{where} [preprocess]", default=0.0),
            std=_floats(pre, "std", c, f"{where} [preprocess]", default=1.0, positive=True),
            interpolation=_typed(pre, "interpolation", str, f"{where} [preprocess]") or "bilinear",
        )
        if preprocess.interpolation not in INTERPOLATIONS:
            raise SpecError(
                f"{where} [preprocess]: interpolation must be one of {', '.join(INTERPOLATIONS)}, "
                f"got {preprocess.interpolation!r}"
            )

        out = _table(data, "output", where, required=True)
        _only_keys(out, {"kind", "labels", "labels_file", "builtin"}, f"{where} [output]")
        out_kind = _typed(out, "kind", str, f"{where} [output]") or "softmax"
        if out_kind not in OUTPUT_KINDS:
            raise SpecError(f"{where} [output]: kind must be softmax or sigmoid, got {out_kind!r}")
        builtin = _typed(out, "builtin", str, f"{where} [output]")
        if builtin is not None and builtin not in BUILTIN_LABELS:
            raise SpecError(f"{where} [output]: builtin labels must be one of {BUILTIN_LABELS}, got {builtin!r}")
        labels = _labels(out, base_dir, f"{where} [output]")
        if not labels and builtin is None:
            raise SpecError(f"{where} [output]: give labels = [...], "
                            "labels_file = \"...\" or builtin = \"imagenet-1k\"")

        card = _typed(data, "card", str, where)
        return cls(
            name=name,
            description=_typed(data, "description", str, where) or "",
            card=card,
            source=source,
            input=input_spec,
            preprocess=preprocess,
            output=OutputSpec(kind=out_kind, labels=tuple(labels), builtin=builtin),
            base_dir=base_dir,
            path=path,
        )

    def resolve(self, relative: str) -> Path:
        """Resolve a path named in the spec: absolute, or relative to the spec's folder."""
        p = Path(relative).expanduser()
        return p if p.is_absolute() else (self.base_dir / p)

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able view of the spec (what the model page and reports show)."""
        return {
            "name": self.name,
            "description": self.description,
            "path": str(self.path) if self.path else None,
            "source": {
                "kind": self.source.kind,
                "architecture": self.source.architecture,
                "factory": self.source.factory,
                "arguments": self.source.arguments,
                "weights": self.source.weights,
                "output_key": self.source.output_key,
                "seed": self.source.seed,
            },
            "input": {"height": self.input.height, "width": self.input.width, "channels": self.input.channels},
            "preprocess": {
                "resize": list(self.preprocess.resize) if self.preprocess.resize else None,
                "crop": list(self.preprocess.crop) if self.preprocess.crop else None,
                "mean": list(self.preprocess.mean),
                "std": list(self.preprocess.std),
                "interpolation": self.preprocess.interpolation,
            },
            "output": {
                "kind": self.output.kind,
                "builtin": self.output.builtin,
                "n_labels": len(self.output.labels) or None,
            },
        }


def _only_keys(table: dict[str, Any], allowed: set[str], where: str) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        raise SpecError(f"{where}: unknown key(s) {', '.join(unknown)}; allowed: {', '.join(sorted(allowed))}")


def _table(data: dict[str, Any], key: str, where: str, *, required: bool = False) -> dict[str, Any]:
    if key not in data:
        if required:
            raise SpecError(f"{where}: the [{key}] table is missing")
        return {}
    value = data[key]
    if not isinstance(value, dict):
        raise SpecError(f"{where}: {key} must be a table ([{key}]), got {type(value).__name__}")
    return value


def _typed(data: dict[str, Any], key: str, kind: type, where: str, *, required: bool = False) -> Any:
    if key not in data:
        if required:
            raise SpecError(f"{where}: the key {key!r} is missing")
        return None
    value = data[key]
    if not isinstance(value, kind) or (kind is int and isinstance(value, bool)):
        raise SpecError(f"{where}: {key} must be a {kind.__name__}, got {value!r}")
    return value


def _seed(data: dict[str, Any], where: str) -> int:
    value = _typed(data, "seed", int, where)
    if value is None:
        return 0
    if not 0 <= value < 2**63:
        raise SpecError(f"{where}: seed must be a whole number from 0 to 2^63 - 1, got {value}")
    return value


def _positive_int(data: dict[str, Any], key: str, where: str, *, required: bool = False) -> int | None:
    value = _typed(data, key, int, where, required=required)
    if value is not None and not (1 <= value <= 8192):
        raise SpecError(f"{where}: {key} must be between 1 and 8192, got {value}")
    return value


def _size(data: dict[str, Any], key: str, where: str, *, allow_single: bool) -> tuple[int, ...] | None:
    if key not in data:
        return None
    value = data[key]
    if isinstance(value, int) and not isinstance(value, bool):
        value = [value] if allow_single else [value, value]
    if (
        not isinstance(value, list)
        or len(value) not in ((1, 2) if allow_single else (2,))
        or not all(isinstance(v, int) and not isinstance(v, bool) and 1 <= v <= 8192 for v in value)
    ):
        raise SpecError(f"{where}: {key} must be a size in pixels (an int or [height, width]), got {value!r}")
    return tuple(value)


def _floats(
    data: dict[str, Any], key: str, n: int, where: str, *, default: float, positive: bool = False
) -> tuple[float, ...]:
    if key not in data:
        return (default,) * n
    value = data[key]
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        value = [value] * n
    if not isinstance(value, list) or len(value) != n:
        raise SpecError(f"{where}: {key} must be a list of {n} numbers (one per input channel), got {value!r}")
    out = []
    for v in value:
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or (positive and v <= 0):
            raise SpecError(f"{where}: {key} must hold finite{' positive' if positive else ''} numbers, got {value!r}")
        out.append(float(v))
    return tuple(out)


def _labels(out: dict[str, Any], base_dir: Path, where: str) -> list[str]:
    if "labels" in out and "labels_file" in out:
        raise SpecError(f"{where}: give labels or labels_file, not both")
    if "labels" in out:
        labels = out["labels"]
        if not isinstance(labels, list) or not labels or not all(isinstance(s, str) for s in labels):
            raise SpecError(f"{where}: labels must be a non-empty list of strings, got {labels!r}")
        return labels
    if "labels_file" in out:
        rel = _typed(out, "labels_file", str, where)
        p = Path(rel).expanduser()
        p = p if p.is_absolute() else base_dir / p
        if not p.is_file():
            raise SpecError(f"{where}: labels_file {str(p)!r} does not exist")
        labels = [line.strip() for line in p.read_text(encoding="utf-8").splitlines() if line.strip()]
        if not labels:
            raise SpecError(f"{where}: labels_file {str(p)!r} is empty")
        return labels
    return []
