"""The layer map: one row per module with its output shape, parameters, MACs and receptive field.

Everything comes from ONE dry forward pass on a seeded random tensor of the declared input shape:

* forward hooks record each module's output shape, how often it ran and in what order;
* ``torch.utils.flop_counter.FlopCounterMode`` counts FLOPs per module (MACs = FLOPs / 2; like
  torchvision's published figures it counts convolutions and matrix products only, without bias);
* an analytic count for ``Conv2d`` / ``Linear`` leaves (output positions × input channels per
  group × kernel area, bias excluded) is kept beside it as a cross-check;
* a dispatch-level tracer follows the receptive field of every tensor through the operators that
  actually ran (so convolutions that pad themselves in ``forward``, ``F.pad``, functional pooling
  and graph modules from ``torch.export.unflatten`` are all seen), using the recurrence of Araujo,
  Norris & Sim, "Computing Receptive Fields of Convolutional Neural Networks", Distill 2019:

      k_eff = d·(k − 1) + 1
      r_out = r_in + (k_eff − 1)·j_in
      j_out = j_in·s
      start_out = start_in + ((k_eff − 1)/2 − p_left)·j_in

  ``start`` is the centre of the first output unit's field in input pixel indices (0 is the centre
  of the top-left pixel); it is negative where the field reaches into padding. ``padding`` is the
  effective left padding P = Σ p_l·∏_{i<l} s_i of the same paper. Sizes are the theoretical ones
  and may exceed the input.

Where paths meet (residual additions, concatenations) the largest field is kept and the row is
flagged ``rf_multipath``. Once spatial structure is pooled away or flattened (global pooling,
``flatten``/``view`` to fewer dimensions, ``Linear`` after flatten) the field is the whole input and
the row is flagged ``rf_global``. Small inputs broadcast onto a larger map (squeeze-and-excitation
gates) are left out of the spatial field, with a note. Operators that change the spatial size in
ways the recurrence does not cover (upsampling, transposed convolution, strided slicing) stop the
tracking for that path, with a note naming the operator.
"""

from __future__ import annotations

import difflib
import time
import weakref
from dataclasses import dataclass, field
from typing import Any

import torch
from torch import nn
from torch.utils._python_dispatch import TorchDispatchMode
from torch.utils._pytree import tree_flatten
from torch.utils.flop_counter import FlopCounterMode

from pellucid.core.errors import BadParameterError, UnsupportedLayerError

__all__ = ["DRY_RUN_SEED", "LayerInfo", "LayerMap", "conv_layer_names", "is_conv_module", "layer_map"]

DRY_RUN_SEED = 0

# Modules that compute something themselves even when they carry helper children (a padding
# module, an Identity): these count as leaves, e.g. "static same padding" convolutions.
_COMPUTING_TYPES: tuple[type[nn.Module], ...] = (
    nn.Conv1d,
    nn.Conv2d,
    nn.Conv3d,
    nn.ConvTranspose2d,
    nn.Linear,
    nn.modules.pooling._MaxPoolNd,
    nn.modules.pooling._AvgPoolNd,
    nn.modules.pooling._AdaptiveAvgPoolNd,
    nn.modules.pooling._AdaptiveMaxPoolNd,
    nn.modules.batchnorm._BatchNorm,
)


@dataclass(frozen=True)
class LayerInfo:
    """One module of the model, as seen in the dry run.

    ``output_shape`` includes the batch dimension (N = 1); for a module that returns several
    tensors it is the first one's. ``params`` is the module's own parameters for a leaf and the
    recursive total for a container. ``macs`` comes from ``FlopCounterMode`` (all calls, children
    included); ``macs_analytic`` is the hand count for ``Conv2d`` / ``Linear`` leaves, else None.
    ``rf_*`` are per axis (height, width); None where the field is unknown or global.
    """

    name: str
    type: str
    kind: str  # "leaf" or "container"
    output_shape: tuple[int, ...] | None
    params: int
    macs: int | None
    macs_analytic: int | None
    calls: int
    call_index: int | None
    is_conv: bool
    rf_size: tuple[int, int] | None
    rf_jump: tuple[int, int] | None
    rf_start: tuple[float, float] | None
    rf_padding: tuple[int, int] | None
    rf_global: bool
    rf_multipath: bool
    notes: tuple[str, ...] = ()

    @property
    def is_leaf(self) -> bool:
        return self.kind == "leaf"

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "type": self.type,
            "kind": self.kind,
            "output_shape": list(self.output_shape) if self.output_shape is not None else None,
            "params": self.params,
            "macs": self.macs,
            "macs_analytic": self.macs_analytic,
            "calls": self.calls,
            "call_index": self.call_index,
            "is_conv": self.is_conv,
            "rf_size": list(self.rf_size) if self.rf_size is not None else None,
            "rf_jump": list(self.rf_jump) if self.rf_jump is not None else None,
            "rf_start": list(self.rf_start) if self.rf_start is not None else None,
            "rf_padding": list(self.rf_padding) if self.rf_padding is not None else None,
            "rf_global": self.rf_global,
            "rf_multipath": self.rf_multipath,
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class LayerMap:
    """All modules of a model (root excluded) in ``named_modules`` order, plus totals."""

    rows: tuple[LayerInfo, ...]
    input_shape: tuple[int, int, int]
    total_params: int
    total_macs: int
    total_macs_analytic: int
    seed: int
    seconds: float
    notes: tuple[str, ...] = ()
    _index: dict[str, int] = field(default_factory=dict, repr=False, compare=False)

    def __post_init__(self) -> None:
        self._index.update({row.name: i for i, row in enumerate(self.rows)})

    def names(self) -> list[str]:
        return [row.name for row in self.rows]

    def by_name(self, name: str) -> LayerInfo:
        if name in self._index:
            return self.rows[self._index[name]]
        close = difflib.get_close_matches(name, self.names(), n=5, cutoff=0.5)
        hint = f" Close names: {', '.join(close)}." if close else ""
        examples = ", ".join(self.leaf_layer_names()[:8])
        raise UnsupportedLayerError(
            f"The model has no layer named {name!r}.{hint} Layer names are the qualified module "
            f"names, for example: {examples}."
        )

    def conv_layers(self) -> list[LayerInfo]:
        """Convolution layers in the order they ran (layers that never ran come last)."""
        convs = [row for row in self.rows if row.is_conv]
        return sorted(convs, key=lambda r: (r.call_index is None, r.call_index or 0))

    def first_conv(self) -> LayerInfo:
        convs = self.conv_layers()
        if not convs:
            raise UnsupportedLayerError("The model has no convolution layer (no 4-D conv weight was found).")
        return convs[0]

    def last_conv(self) -> LayerInfo:
        convs = [row for row in self.conv_layers() if row.call_index is not None] or self.conv_layers()
        if not convs:
            raise UnsupportedLayerError("The model has no convolution layer (no 4-D conv weight was found).")
        return convs[-1]

    def leaf_layer_names(self) -> list[str]:
        """Leaves that ran in the dry run: the modules a forward hook can usefully watch."""
        return [row.name for row in self.rows if row.is_leaf and row.calls > 0]

    def to_dict(self) -> dict[str, Any]:
        return {
            "input_shape": list(self.input_shape),
            "total_params": self.total_params,
            "total_macs": self.total_macs,
            "total_macs_analytic": self.total_macs_analytic,
            "seed": self.seed,
            "seconds": self.seconds,
            "notes": list(self.notes),
            "rows": [row.to_dict() for row in self.rows],
        }


# ---------------------------------------------------------------------------------------------
# Receptive-field state of one tensor


@dataclass(frozen=True)
class _Field:
    status: str  # "tracked", "global" or "unknown"
    size: tuple[int, int] = (1, 1)
    jump: tuple[int, int] = (1, 1)
    start: tuple[float, float] = (0.0, 0.0)
    padding: tuple[int, int] = (0, 0)
    multipath: bool = False
    reason: str = ""

    def with_multipath(self, flag: bool) -> _Field:
        if flag and not self.multipath:
            return _Field(self.status, self.size, self.jump, self.start, self.padding, True, self.reason)
        return self

    def through(self, k: tuple[int, int], s: tuple[int, int], p: tuple[int, int], d: tuple[int, int]) -> _Field:
        """The field after a sliding window with kernel k, stride s, left padding p, dilation d."""
        if self.status != "tracked":
            return self
        size, jump, start, pad = [], [], [], []
        for ax in range(2):
            k_eff = d[ax] * (k[ax] - 1) + 1
            size.append(self.size[ax] + (k_eff - 1) * self.jump[ax])
            start.append(self.start[ax] + ((k_eff - 1) / 2 - p[ax]) * self.jump[ax])
            pad.append(self.padding[ax] + p[ax] * self.jump[ax])
            jump.append(self.jump[ax] * s[ax])
        return _Field("tracked", (size[0], size[1]), (jump[0], jump[1]), (start[0], start[1]),
                      (pad[0], pad[1]), self.multipath)

    def padded(self, left: tuple[int, int]) -> _Field:
        if self.status != "tracked":
            return self
        return _Field(
            "tracked",
            self.size,
            self.jump,
            (self.start[0] - left[0] * self.jump[0], self.start[1] - left[1] * self.jump[1]),
            (self.padding[0] + left[0] * self.jump[0], self.padding[1] + left[1] * self.jump[1]),
            self.multipath,
        )


_GLOBAL = _Field("global")


def _merge(fields: list[_Field]) -> _Field:
    """Where paths meet: the largest field wins and the result is flagged as multi-path."""
    distinct = list(dict.fromkeys(fields))
    if len(distinct) == 1:
        return distinct[0]
    multipath = True
    if any(f.status == "global" for f in distinct):
        return _GLOBAL.with_multipath(multipath)
    tracked = [f for f in distinct if f.status == "tracked"]
    if not tracked:
        return distinct[0].with_multipath(multipath)
    best = max(tracked, key=lambda f: (f.size[0] * f.size[1], f.size))
    return best.with_multipath(multipath)


def _pair(value: Any, default: tuple[int, int] | None = None) -> tuple[int, int]:
    if value is None or (isinstance(value, (list, tuple)) and len(value) == 0):
        if default is None:
            raise ValueError("missing window parameter")
        return default
    if isinstance(value, (list, tuple)):
        if len(value) == 1:
            return int(value[0]), int(value[0])
        return int(value[-2]), int(value[-1])
    return int(value), int(value)


def _bind(func: Any, args: tuple, kwargs: dict) -> dict[str, Any]:
    bound: dict[str, Any] = {}
    for i, arg in enumerate(func._schema.arguments):
        if i < len(args):
            bound[arg.name] = args[i]
        elif arg.name in kwargs:
            bound[arg.name] = kwargs[arg.name]
        elif arg.has_default_value():
            bound[arg.name] = arg.default_value
        else:
            bound[arg.name] = None
    return bound


_CONV_OPS = {"conv2d", "convolution", "_convolution"}
_MAX_POOL_OPS = {"max_pool2d", "max_pool2d_with_indices"}
_AVG_POOL_OPS = {"avg_pool2d"}
_PAD_OPS = {"constant_pad_nd", "pad", "reflection_pad2d", "replication_pad2d", "_pad_circular"}
_ADAPTIVE_OPS = {"adaptive_avg_pool2d", "_adaptive_avg_pool2d", "adaptive_max_pool2d"}
# Operators whose output does not depend on the input's values: they carry no field on.
_NO_FIELD_OPS = {"empty_like", "zeros_like", "ones_like", "full_like", "rand_like", "randn_like"}


class _FieldTracer(TorchDispatchMode):
    """Follows every tensor's receptive field through the operators that run under it."""

    def __init__(self) -> None:
        super().__init__()
        # id(tensor) -> (weak reference, field); the weak reference guards against reused ids.
        self._fields: dict[int, tuple[weakref.ref, _Field]] = {}
        self.notes: list[str] = []

    def set(self, tensor: torch.Tensor, value: _Field) -> None:
        self._fields[id(tensor)] = (weakref.ref(tensor), value)

    def get(self, tensor: Any) -> _Field | None:
        if not isinstance(tensor, torch.Tensor):
            return None
        entry = self._fields.get(id(tensor))
        if entry is None or entry[0]() is not tensor:
            return None
        return entry[1]

    def _note(self, text: str) -> None:
        if text not in self.notes:
            self.notes.append(text)

    def __torch_dispatch__(self, func: Any, types: Any, args: tuple = (), kwargs: dict | None = None) -> Any:
        kwargs = kwargs or {}
        out = func(*args, **kwargs)
        try:
            self._propagate(func, args, kwargs, out)
        except (ValueError, TypeError, IndexError, AttributeError) as exc:
            # Bookkeeping must never break the model's own forward pass.
            self._note(f"receptive field not tracked through {func}: {exc}")
            for t in tree_flatten(out)[0]:
                if isinstance(t, torch.Tensor):
                    self.set(t, _Field("unknown", reason=f"not tracked through {func}"))
        return out

    def _propagate(self, func: Any, args: tuple, kwargs: dict, out: Any) -> None:
        name = func.overloadpacket.__name__
        if name in _NO_FIELD_OPS:
            return
        inputs = [t for t in tree_flatten((args, kwargs))[0] if isinstance(t, torch.Tensor)]
        known = [(t, f) for t in inputs if (f := self.get(t)) is not None]
        if not known:
            return
        outs = [t for t in tree_flatten(out)[0] if isinstance(t, torch.Tensor)]
        if not outs:
            return
        first = self.get(args[0]) if args else None
        if first is not None and first.status == "tracked" and isinstance(args[0], torch.Tensor) \
                and args[0].dim() == 4:
            result = self._geometry(name, func, args, kwargs, outs[0])
            if result is not None:
                value = result(first)
                for t in outs:
                    self.set(t, value)
                return
        for t in outs:
            self.set(t, self._generic(name, known, t))

    def _geometry(self, name: str, func: Any, args: tuple, kwargs: dict, out: torch.Tensor) -> Any:
        """For operators that move the field, a function from input field to output field."""
        x = args[0]
        if name in _CONV_OPS:
            b = _bind(func, args, kwargs)
            if b.get("transposed"):
                note = "transposed convolution: receptive field not tracked past it"
                self._note(note)
                return lambda f: _Field("unknown", reason=note)
            weight = b["weight"]
            k = (int(weight.shape[-2]), int(weight.shape[-1]))
            s = _pair(b.get("stride"), (1, 1))
            d = _pair(b.get("dilation"), (1, 1))
            padding = b.get("padding")
            if isinstance(padding, str):
                if padding == "valid":
                    p = (0, 0)
                else:  # "same": torch puts the odd extra pixel on the right/bottom
                    p = ((d[0] * (k[0] - 1)) // 2, (d[1] * (k[1] - 1)) // 2)
            else:
                p = _pair(padding, (0, 0))
            return lambda f: f.through(k, s, p, d)
        if name in _MAX_POOL_OPS or name in _AVG_POOL_OPS:
            b = _bind(func, args, kwargs)
            k = _pair(b["kernel_size"])
            s = _pair(b.get("stride"), k)
            p = _pair(b.get("padding"), (0, 0))
            d = _pair(b.get("dilation"), (1, 1)) if name in _MAX_POOL_OPS else (1, 1)
            return lambda f: f.through(k, s, p, d)
        if name in _PAD_OPS:
            b = _bind(func, args, kwargs)
            pad = list(b.get("pad") or b.get("padding") or [])
            if len(pad) < 4 and len(pad) != 2:
                return None
            left_w = int(pad[0])
            left_h = int(pad[2]) if len(pad) >= 4 else 0
            return lambda f: f.padded((left_h, left_w))
        if name in _ADAPTIVE_OPS:
            in_hw = tuple(x.shape[-2:])
            out_hw = tuple(out.shape[-2:])
            if out_hw == in_hw:
                return lambda f: f
            if out_hw == (1, 1):
                return lambda f: _GLOBAL.with_multipath(f.multipath)
            if in_hw[0] % out_hw[0] == 0 and in_hw[1] % out_hw[1] == 0:
                k = (in_hw[0] // out_hw[0], in_hw[1] // out_hw[1])
                return lambda f: f.through(k, k, (0, 0), (1, 1))
            note = f"adaptive pooling from {in_hw} to {out_hw} has uneven windows: field not tracked past it"
            self._note(note)
            return lambda f: _Field("unknown", reason=note)
        return None

    def _generic(self, name: str, known: list[tuple[torch.Tensor, _Field]], out: torch.Tensor) -> _Field:
        """Operators that do not move the field: pointwise maps, normalisation, joins, reshapes."""
        if out.dim() != 4:
            # Spatial positions were flattened or reduced away: every output sees the whole input.
            multipath = any(f.multipath for _, f in known)
            return _GLOBAL.with_multipath(multipath)
        out_hw = tuple(out.shape[-2:])
        same = [f for t, f in known if t.dim() == 4 and tuple(t.shape[-2:]) == out_hw]
        if same:
            broadcast = [f for t, f in known if t.dim() == 4 and tuple(t.shape[-2:]) == (1, 1) and out_hw != (1, 1)]
            if broadcast:
                self._note(
                    "an input of spatial size 1×1 was broadcast onto a larger map (for example a "
                    "squeeze-and-excitation gate); its global context is left out of the receptive field"
                )
            return _merge(same)
        if all(f.status == "global" for _, f in known):
            return _GLOBAL.with_multipath(any(f.multipath for _, f in known))
        if any(f.status == "unknown" for _, f in known):
            return next(f for _, f in known if f.status == "unknown")
        if out_hw == (1, 1):
            return _GLOBAL.with_multipath(any(f.multipath for _, f in known))
        note = f"operator {name} changes the spatial size: receptive field not tracked past it"
        self._note(note)
        return _Field("unknown", reason=note)


# ---------------------------------------------------------------------------------------------
# The dry run


@dataclass
class _Seen:
    calls: int = 0
    call_index: int | None = None
    output_shape: tuple[int, ...] | None = None
    shapes_differ: bool = False
    field: _Field | None = None
    macs_analytic: int = 0
    returned_tensor: bool = True


def _first_tensor(value: Any) -> torch.Tensor | None:
    for t in tree_flatten(value)[0]:
        if isinstance(t, torch.Tensor):
            return t
    return None


def _analytic_macs(module: nn.Module, inputs: tuple, output: torch.Tensor) -> int:
    if isinstance(module, nn.Conv2d):
        kh, kw = module.kernel_size
        return int(output.numel()) * (module.in_channels // module.groups) * kh * kw
    if isinstance(module, nn.Linear):
        return int(output.numel()) * module.in_features
    return 0


def _is_leaf(module: nn.Module) -> bool:
    return not any(True for _ in module.children()) or isinstance(module, _COMPUTING_TYPES)


def is_conv_module(module: nn.Module) -> bool:
    """A 2-D convolution: an ``nn.Conv2d`` (or subclass), or any other module that directly owns a
    4-D ``weight`` (graph modules from ``torch.export.unflatten`` and TorchScript modules lose the
    class). Transposed and 3-D convolutions are not included."""
    if isinstance(module, nn.Conv2d):
        return True
    if isinstance(module, nn.modules.conv._ConvNd):
        return False
    weight = getattr(module, "weight", None)
    if not isinstance(weight, torch.Tensor) or weight.dim() != 4:
        return False
    original = getattr(module, "original_name", "")  # TorchScript keeps the Python class name here
    return original not in ("ConvTranspose2d", "Conv3d")


def conv_layer_names(model: nn.Module) -> list[str]:
    """Qualified names of the 2-D convolutions in definition order; needs no forward pass."""
    return [name for name, mod in model.named_modules() if name and is_conv_module(mod)]


def _check_input_shape(input_shape: Any) -> tuple[int, int, int]:
    ok = (
        isinstance(input_shape, (tuple, list))
        and len(input_shape) == 3
        and all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in input_shape)
    )
    if not ok:
        raise BadParameterError(
            f"input_shape must be three positive integers (channels, height, width); got {input_shape!r}. "
            "For an RGB model at 224×224 pass (3, 224, 224)."
        )
    return int(input_shape[0]), int(input_shape[1]), int(input_shape[2])


def _check_module(model: Any) -> None:
    if isinstance(model, torch.jit.ScriptModule):
        raise UnsupportedLayerError(
            "The layer map (and every per-layer view) is unavailable for TorchScript: needs forward hooks, which "
            "torch does not support on TorchScript modules. Export the model with torch.export "
            "(torch.export.export(model, (example,)) then torch.export.save) and load the .pt2 archive instead."
        )
    if not isinstance(model, nn.Module):
        raise BadParameterError(f"layer_map needs a torch.nn.Module; got {type(model).__name__}.")


def _dry_input(model: nn.Module, shape: tuple[int, int, int]) -> torch.Tensor:
    # Match the parameters' dtype and device; a model on the "meta" device maps without computing.
    dtype, device = torch.float32, torch.device("cpu")
    for p in model.parameters():
        if p.is_floating_point():
            dtype, device = p.dtype, p.device
            break
    gen = torch.Generator().manual_seed(DRY_RUN_SEED)
    return torch.randn((1, *shape), generator=gen).to(device=device, dtype=dtype)


def layer_map(model: nn.Module, *, input_shape: tuple[int, int, int]) -> LayerMap:
    """Map every module of ``model`` from one dry forward pass on a (1, C, H, W) random tensor.

    ``input_shape`` is (C, H, W). A model built on the "meta" device is mapped without any
    arithmetic (shapes, counts and fields only). The model runs in eval mode under ``torch.inference_mode()``; its
    training flag is restored afterwards and every hook is removed, also when the forward raises.
    Raises UnsupportedLayerError for TorchScript modules, BadParameterError for a bad input shape or
    a forward pass that fails on it.
    """
    _check_module(model)
    shape = _check_input_shape(input_shape)
    started = time.perf_counter()

    named = [(name, mod) for name, mod in model.named_modules() if name]
    seen: dict[str, _Seen] = {name: _Seen() for name, _ in named}
    tracer = _FieldTracer()
    order = [0]
    handles: list[torch.utils.hooks.RemovableHandle] = []

    def make_hooks(name: str) -> tuple[Any, Any]:
        record = seen[name]

        def pre_hook(module: nn.Module, inputs: tuple) -> None:
            if record.call_index is None:
                record.call_index = order[0]
                order[0] += 1

        def post_hook(module: nn.Module, inputs: tuple, output: Any) -> None:
            record.calls += 1
            tensor = _first_tensor(output)
            if tensor is None:
                record.returned_tensor = False
                return
            out_shape = tuple(int(v) for v in tensor.shape)
            if record.output_shape is None:
                record.output_shape = out_shape
            elif record.output_shape != out_shape:
                record.shapes_differ = True
            value = tracer.get(tensor)
            if value is not None:
                record.field = value if record.field is None else _merge([record.field, value])
            record.macs_analytic += _analytic_macs(module, inputs, tensor)

        return pre_hook, post_hook

    was_training = model.training
    x = _dry_input(model, shape)
    try:
        for name, mod in named:
            pre, post = make_hooks(name)
            handles.append(mod.register_forward_pre_hook(pre))
            handles.append(mod.register_forward_hook(post))
        model.eval()
        counter = FlopCounterMode(display=False)
        try:
            with torch.inference_mode(), counter, tracer:
                tracer.set(x, _Field("tracked"))
                model(x)
        except Exception as exc:
            raise BadParameterError(
                f"The dry forward pass on a random tensor of shape (1, {shape[0]}, {shape[1]}, {shape[2]}) "
                f"failed: {type(exc).__name__}: {exc}. Check that input_shape (C, H, W) is what the model "
                "expects."
            ) from exc
    finally:
        for handle in handles:
            handle.remove()
        model.train(was_training)

    flops = counter.get_flop_counts()
    root = type(model).__name__
    modules = dict(named)
    rows = []
    for name, mod in named:
        record = seen[name]
        leaf = _is_leaf(mod)
        if leaf:
            params = sum(p.numel() for p in mod.parameters(recurse=False))
        else:
            params = sum(p.numel() for p in mod.parameters())
        module_flops = flops.get(f"{root}.{name}")
        macs = sum(module_flops.values()) // 2 if module_flops is not None else (0 if record.calls else None)
        notes: list[str] = []
        if record.calls == 0:
            if any(seen.get(f"{name}.{child}", _Seen()).calls for child, _ in mod.named_children()):
                notes.append("not called itself; its children ran")
            else:
                notes.append("not called in the dry run")
        elif record.calls > 1:
            notes.append(f"called {record.calls} times; output shape of the first call, largest receptive field")
        if record.shapes_differ:
            notes.append("output shape differs between calls")
        if record.calls and not record.returned_tensor:
            notes.append("returned no tensor")
        rf = record.field
        if rf is not None and rf.multipath:
            notes.append("several paths meet before this layer; the largest receptive field is shown")
        if rf is not None and rf.status == "unknown":
            notes.append(rf.reason)
        tracked = rf is not None and rf.status == "tracked"
        rows.append(
            LayerInfo(
                name=name,
                type=type(mod).__name__,
                kind="leaf" if leaf else "container",
                output_shape=record.output_shape,
                params=int(params),
                macs=int(macs) if macs is not None else None,
                macs_analytic=record.macs_analytic if isinstance(mod, (nn.Conv2d, nn.Linear)) and leaf else None,
                calls=record.calls,
                call_index=record.call_index,
                is_conv=is_conv_module(modules[name]),
                rf_size=(rf.size if tracked
                         else (shape[1], shape[2]) if rf is not None and rf.status == "global" else None),
                rf_jump=rf.jump if tracked else None,
                rf_start=rf.start if tracked else None,
                rf_padding=rf.padding if tracked else None,
                rf_global=rf is not None and rf.status == "global",
                rf_multipath=rf is not None and rf.multipath,
                notes=tuple(notes),
            )
        )

    total_params = sum(p.numel() for p in model.parameters())
    total_flops = sum(flops.get("Global", {}).values())
    total_analytic = sum(r.macs_analytic or 0 for r in rows if r.is_leaf)
    return LayerMap(
        rows=tuple(rows),
        input_shape=shape,
        total_params=int(total_params),
        total_macs=int(total_flops // 2),
        total_macs_analytic=int(total_analytic),
        seed=DRY_RUN_SEED,
        seconds=time.perf_counter() - started,
        notes=tuple(tracer.notes),
    )
