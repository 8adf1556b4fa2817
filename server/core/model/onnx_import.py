"""ONNX files as torch modules: the ONNX graph rebuilt as a ``torch.fx`` GraphModule.

Pellucid needs forward hooks on named layers and gradients with respect to the input, which an
ONNX runtime does not give. This module reads the graph with the ``onnx`` package (the extra
``pellucid[onnx]``) and rebuilds it node by node:

* ``Conv``, ``Gemm`` (with constant weights), ``BatchNormalization``, pooling and activations become
  ordinary ``torch.nn`` modules, so the layer map, activation maps and Grad-CAM see them. A module is
  named after its weights when the exporter kept the original names (``layer1.0.conv1.weight`` →
  ``layer1.0.conv1``), else after the exporter's scope or the ONNX node name;
* shape and arithmetic operators become torch functions (written so that ``torch.fx`` can trace the
  rebuilt module again, as the incremental occlusion engine does, for the common CNN operators);
* a node whose inputs are all constants is computed once, here, and becomes a constant.

The batch dimension stays free. Floating-point weights are read as float32. Operators outside
:data:`SUPPORTED_OPS`, other operator domains and graphs with more than one input are refused with
one sentence naming them. Semantics follow the ONNX operator specification (onnx.ai, "ONNX
Operators", opsets 7–22); where two opsets differ (axes as attribute or input) both forms are read.
"""

from __future__ import annotations

import math
import operator
import re
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import torch
import torch.nn.functional as F
from torch import fx, nn

from pellucid.core.errors import ModelLoadError

__all__ = ["SUPPORTED_OPS", "convert_onnx", "load_onnx"]

Value = Any  # torch.Tensor (a constant) | fx.Node (computed at run time) | None (an absent optional input)


# --- run-time helpers (fx leaves: tracing records them as single calls) ------------------------------------


def _onnx_reshape(x: torch.Tensor, shape: Any, allowzero: int = 0) -> torch.Tensor:
    dims = [int(v) for v in (shape.tolist() if isinstance(shape, torch.Tensor) else shape)]
    if not allowzero:
        dims = [x.shape[i] if d == 0 else d for i, d in enumerate(dims)]
    return torch.reshape(x, dims)


def _onnx_flatten(x: torch.Tensor, axis: int) -> torch.Tensor:
    axis = axis + x.ndim if axis < 0 else axis
    outer = math.prod(x.shape[:axis])
    return torch.reshape(x, (outer, -1))


def _onnx_shape(x: torch.Tensor, start: int = 0, end: int | None = None) -> torch.Tensor:
    return torch.tensor(list(x.shape)[start:end], dtype=torch.int64)


def _onnx_gather(data: torch.Tensor, indices: torch.Tensor, axis: int = 0) -> torch.Tensor:
    axis = axis + data.ndim if axis < 0 else axis
    idx = indices.to(torch.int64)
    idx = torch.where(idx < 0, idx + data.shape[axis], idx)
    flat = torch.index_select(data, axis, idx.reshape(-1))
    return flat.reshape(data.shape[:axis] + idx.shape + data.shape[axis + 1 :])


def _onnx_transpose(x: torch.Tensor, perm: Sequence[int] | None) -> torch.Tensor:
    return x.permute(*(perm if perm is not None else reversed(range(x.ndim))))


def _onnx_div(a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    if not a.is_floating_point() and not b.is_floating_point():
        return torch.div(a, b, rounding_mode="trunc")
    return a / b


def _onnx_unsqueeze(x: torch.Tensor, axes: Sequence[int]) -> torch.Tensor:
    rank = x.ndim + len(axes)
    for a in sorted(a + rank if a < 0 else a for a in axes):
        x = x.unsqueeze(a)
    return x


def _onnx_squeeze(x: torch.Tensor, axes: Sequence[int] | None) -> torch.Tensor:
    if axes is None:
        return x.squeeze()
    dims = sorted((a + x.ndim if a < 0 else a for a in axes), reverse=True)
    for d in dims:
        x = x.squeeze(d)
    return x


def _as_ints(v: Any) -> list[int] | None:
    if v is None:
        return None
    return [int(i) for i in (v.reshape(-1).tolist() if isinstance(v, torch.Tensor) else v)]


def _onnx_slice(x: torch.Tensor, starts: Any, ends: Any, axes: Any, steps: Any) -> torch.Tensor:
    big = 2**62
    starts = [max(-big, min(big, v)) for v in _as_ints(starts)]
    ends = [max(-big, min(big, v)) for v in _as_ints(ends)]
    axes, steps = _as_ints(axes), _as_ints(steps)
    axes = list(axes) if axes is not None else list(range(len(starts)))
    steps = list(steps) if steps is not None else [1] * len(starts)
    index: list[Any] = [slice(None)] * x.ndim
    flips = []
    for s, e, a, st in zip(starts, ends, axes, steps):
        a = a + x.ndim if a < 0 else a
        n = x.shape[a]
        if st > 0:
            s = max(0, min(n, s + n if s < 0 else s))
            e = max(0, min(n, e + n if e < 0 else e))
            index[a] = slice(s, e, st)
        else:  # torch slices only forward: flip, then slice forward
            s = max(-1, min(n - 1, s + n if s < 0 else s))
            e = max(-1, min(n - 1, e + n if e < 0 else e))
            flips.append(a)
            index[a] = slice(n - 1 - s, n - 1 - e, -st)
    if flips:
        x = torch.flip(x, flips)
    return x[tuple(index)]


def _onnx_pad(x: torch.Tensor, pads: Sequence[int], mode: str = "constant", value: float = 0.0,
              axes: Sequence[int] | None = None) -> torch.Tensor:
    rank = x.ndim
    axes = [a + rank if a < 0 else a for a in (axes if axes is not None else range(rank))]
    k = len(axes)
    begins, ends = list(pads[:k]), list(pads[k:])
    torch_pads: list[int] = []
    for axis in reversed(range(rank)):  # F.pad takes (last-dim begin, last-dim end, …)
        if axis in axes:
            i = axes.index(axis)
            torch_pads += [int(begins[i]), int(ends[i])]
        else:
            torch_pads += [0, 0]
    while len(torch_pads) > 2 and torch_pads[-2:] == [0, 0]:
        torch_pads = torch_pads[:-2]
    torch_mode = {"constant": "constant", "reflect": "reflect", "edge": "replicate", "wrap": "circular"}[mode]
    if torch_mode == "constant":
        return F.pad(x, torch_pads, mode="constant", value=value)
    return F.pad(x, torch_pads, mode=torch_mode)


def _onnx_same_pad(x: torch.Tensor, kernel: Sequence[int], strides: Sequence[int], dilations: Sequence[int],
                   upper: bool, value: float = 0.0) -> torch.Tensor:
    pads: list[int] = []
    for size, k, s, d in reversed(list(zip(x.shape[2:], kernel, strides, dilations))):
        total = max(0, (math.ceil(size / s) - 1) * s + (k - 1) * d + 1 - size)
        small, large = total // 2, total - total // 2
        pads += [small, large] if upper else [large, small]
    return F.pad(x, pads, mode="constant", value=value)


def _onnx_reduce(x: torch.Tensor, op: str, axes: Sequence[int] | None, keepdims: int) -> torch.Tensor:
    dims = list(range(x.ndim)) if not axes else [a + x.ndim if a < 0 else a for a in axes]
    if op == "mean":
        return torch.mean(x, dim=dims, keepdim=bool(keepdims))
    if op == "sum":
        return torch.sum(x, dim=dims, keepdim=bool(keepdims))
    if op == "sumsquare":
        return torch.sum(x * x, dim=dims, keepdim=bool(keepdims))
    if op == "l2":
        return torch.sqrt(torch.sum(x * x, dim=dims, keepdim=bool(keepdims)))
    out = x
    for d in sorted(dims, reverse=True):
        out = (torch.amax if op == "max" else torch.amin)(out, dim=d, keepdim=bool(keepdims))
    return out


def _onnx_gemm(a: torch.Tensor, b: torch.Tensor, c: torch.Tensor | None, alpha: float, beta: float,
               trans_a: int, trans_b: int) -> torch.Tensor:
    a = a.transpose(0, 1) if trans_a else a
    b = b.transpose(0, 1) if trans_b else b
    out = alpha * torch.matmul(a, b)
    return out if c is None else out + beta * c


def _onnx_split(x: torch.Tensor, sizes: Any, axis: int) -> tuple[torch.Tensor, ...]:
    return tuple(torch.split(x, _as_ints(sizes), dim=axis))


def _onnx_split_even(x: torch.Tensor, parts: int, axis: int) -> tuple[torch.Tensor, ...]:
    n = x.shape[axis]
    size = -(-n // parts)
    return tuple(torch.split(x, size, dim=axis))


def _onnx_expand(x: torch.Tensor, shape: Any) -> torch.Tensor:
    dims = [int(v) for v in (shape.tolist() if isinstance(shape, torch.Tensor) else shape)]
    rank = max(len(dims), x.ndim)
    x = x.reshape((1,) * (rank - x.ndim) + tuple(x.shape))
    dims = [1] * (rank - len(dims)) + dims
    return x.expand([max(a, b) if b != 1 else a for a, b in zip(x.shape, dims)])


def _onnx_softmax(x: torch.Tensor, axis: int, legacy: bool, log: bool) -> torch.Tensor:
    fn = torch.log_softmax if log else torch.softmax
    if not legacy:
        return fn(x, dim=axis)
    axis = axis + x.ndim if axis < 0 else axis  # opset < 13: coerce to 2-D at axis
    flat = x.reshape(math.prod(x.shape[:axis]), -1)
    return fn(flat, dim=1).reshape(x.shape)


def _onnx_constant_of_shape(shape: Any, value: torch.Tensor | None) -> torch.Tensor:
    dims = [int(v) for v in (shape.tolist() if isinstance(shape, torch.Tensor) else shape)]
    fill = value.reshape(()) if value is not None else torch.tensor(0.0)
    return torch.full(dims, fill.item(), dtype=fill.dtype)


def _onnx_batchnorm(x: torch.Tensor, scale: torch.Tensor, bias: torch.Tensor, mean: torch.Tensor,
                    var: torch.Tensor, eps: float) -> torch.Tensor:
    return F.batch_norm(x, mean, var, scale, bias, training=False, eps=eps)


def _onnx_layer_norm(x: torch.Tensor, scale: torch.Tensor, bias: torch.Tensor | None, axis: int,
                     eps: float) -> torch.Tensor:
    axis = axis + x.ndim if axis < 0 else axis
    shape = tuple(x.shape[axis:])
    return F.layer_norm(x, shape, scale.expand(shape) if scale is not None else None,
                        bias.expand(shape) if bias is not None else None, eps)


class OnnxBatchNorm(nn.modules.batchnorm._BatchNorm):
    """Inference batch normalisation over dimension 1 for inputs of any rank (as ONNX defines it)."""

    def _check_input_dim(self, input: torch.Tensor) -> None:
        # No rank test here: F.batch_norm checks the channel count, and a test on input.dim() would
        # be control flow that torch.fx cannot trace.
        return None


# --- the converter -----------------------------------------------------------------------------------------


class _Builder:
    def __init__(self, model: Any) -> None:
        import onnx
        from onnx import numpy_helper

        self.onnx = onnx
        self.numpy_helper = numpy_helper
        self.model = model
        self.graph = fx.Graph()
        self.root = nn.Module()
        self.values: dict[str, Value] = {}
        self.opset = next((o.version for o in model.opset_import if o.domain in ("", "ai.onnx")), 13)
        self.n_const = 0
        self.leaf_paths: set[str] = set()
        self.container_paths: set[str] = set()
        self.notes: list[str] = []

    # values ----------------------------------------------------------------------------------------------
    def tensor(self, proto: Any) -> torch.Tensor:
        arr = self.numpy_helper.to_array(proto)
        t = torch.from_numpy(arr.copy())
        if t.is_floating_point() and t.dtype != torch.float32:
            t = t.to(torch.float32)
        return t

    def arg(self, v: Value) -> Any:
        """A value as an fx argument: constants become buffers read with get_attr."""
        if isinstance(v, torch.Tensor):
            name = f"onnx_const_{self.n_const}"
            self.n_const += 1
            self.root.register_buffer(name, v)
            return self.graph.get_attr(name)
        return v

    def call(self, fn: Callable, *args: Value, **kwargs: Any) -> Value:
        """``fn(*args, **kwargs)``: computed now when every tensor argument is constant, else a graph node."""
        if not any(isinstance(a, fx.Node) for a in args) and not any(isinstance(v, fx.Node) for v in kwargs.values()):
            with torch.no_grad():
                return fn(*args, **kwargs)
        return self.graph.call_function(fn, tuple(self.arg(a) for a in args),
                                        {k: self.arg(v) for k, v in kwargs.items()})

    def module(self, node: Any, module: nn.Module, x: Value, *, weight_name: str | None = None) -> fx.Node:
        path = self._place(self._module_path(node, weight_name), module)
        if isinstance(x, torch.Tensor):
            x = self.arg(x)
        return self.graph.call_module(path, (x,))

    # naming ----------------------------------------------------------------------------------------------
    def _module_path(self, node: Any, weight_name: str | None) -> str:
        if weight_name and weight_name.endswith(".weight") and "::" not in weight_name:
            path = _clean(weight_name[: -len(".weight")])
            if path:
                return path
        meta = {p.key: p.value for p in node.metadata_props}
        scopes = meta.get("pkg.torch.onnx.name_scopes")  # the torch.export-based exporter: ['', 'layer1', …, op]
        if scopes:
            parts = [p.strip(" '\"") for p in scopes.strip("[]").split(",")][:-1]
            path = _clean(_qualify(p for p in parts if p))
            if path:
                return path
        if node.name.startswith("/"):  # the TorchScript-based exporter: /layer1/layer1.0/conv1/Conv
            path = _clean(_qualify(node.name.strip("/").split("/")[:-1]))
            if path:
                return path
        name = node.name[5:] if node.name.startswith("node_") else node.name
        return _clean(name.replace(".", "_")) or node.op_type.lower()

    def _place(self, path: str, module: nn.Module) -> str:
        parts = path.split(".")
        ok = path not in self.leaf_paths and path not in self.container_paths and all(
            ".".join(parts[:i]) not in self.leaf_paths for i in range(1, len(parts)))
        if not ok:
            flat = path.replace(".", "_")
            path, i = flat, 1
            while path in self.leaf_paths or path in self.container_paths:
                i += 1
                path = f"{flat}_{i}"
            parts = [path]
        parent = self.root
        for i, p in enumerate(parts[:-1]):
            prefix = ".".join(parts[: i + 1])
            if not hasattr(parent, p) or not isinstance(getattr(parent, p), nn.Module):
                parent.add_module(p, nn.Module())
            self.container_paths.add(prefix)
            parent = getattr(parent, p)
        parent.add_module(parts[-1], module)
        self.leaf_paths.add(path)
        return path

    # the graph -------------------------------------------------------------------------------------------
    def build(self) -> fx.GraphModule:
        g = self.model.graph
        for init in g.initializer:
            self.values[init.name] = self.tensor(init)
        inputs = [i for i in g.input if i.name not in self.values]
        if len(inputs) != 1:
            raise ModelLoadError(
                f"the ONNX graph takes {len(inputs)} inputs ({', '.join(i.name for i in inputs)}); Pellucid explains "
                "models that take one image tensor"
            )
        elem = inputs[0].type.tensor_type.elem_type
        if elem not in (self.onnx.TensorProto.FLOAT, self.onnx.TensorProto.FLOAT16, self.onnx.TensorProto.DOUBLE):
            raise ModelLoadError(f"the ONNX graph's input {inputs[0].name!r} is not a floating-point tensor")
        self.values[inputs[0].name] = self.graph.placeholder("x")
        unsupported = sorted({f"{n.domain + '.' if n.domain not in ('', 'ai.onnx') else ''}{n.op_type}"
                              for n in g.node if n.domain not in ("", "ai.onnx") or n.op_type not in _OPS})
        if unsupported:
            raise ModelLoadError(
                f"the ONNX graph uses operator(s) Pellucid cannot rebuild in torch: {', '.join(unsupported)}. "
                "Export the model as a torch.export archive (kind = \"export\") or give its code and weights "
                "(kind = \"factory\") instead"
            )
        for node in g.node:
            ins = [self.values[name] if name else None for name in node.input]
            missing = [name for name in node.input if name and name not in self.values]
            if missing:
                raise ModelLoadError(f"the ONNX graph is not in topological order (node {node.name!r})")
            attrs = {a.name: self.onnx.helper.get_attribute_value(a) for a in node.attribute}
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in attrs.items()}
            if node.op_type == "Constant":
                outs: list[Value] = [self._constant(attrs)]
            else:
                try:
                    result = _OPS[node.op_type](self, node, ins, attrs)
                except ModelLoadError:
                    raise
                except Exception as exc:  # noqa: BLE001 - a node we cannot rebuild: name it
                    raise ModelLoadError(
                        f"could not rebuild ONNX node {node.name or node.op_type!r} ({node.op_type}): "
                        f"{str(exc).splitlines()[0][:200]}"
                    ) from None
                outs = list(result) if isinstance(result, (list, tuple)) else [result]
            for name, value in zip(node.output, outs):
                if name:
                    self.values[name] = value
        outputs = [self.values[o.name] for o in g.output]
        if any(not isinstance(v, fx.Node) for v in outputs):
            raise ModelLoadError("an output of the ONNX graph does not depend on its input")
        if len(outputs) == 1:
            self.graph.output(outputs[0])
        else:
            self.graph.output({o.name: v for o, v in zip(g.output, outputs)})
        gm = fx.GraphModule(self.root, self.graph, class_name="OnnxGraph")
        return gm.eval()

    def _constant(self, attrs: dict[str, Any]) -> torch.Tensor:
        if "value" in attrs:
            return self.tensor(attrs["value"])
        for key, dtype in (("value_float", torch.float32), ("value_int", torch.int64),
                           ("value_floats", torch.float32), ("value_ints", torch.int64)):
            if key in attrs:
                return torch.tensor(attrs[key], dtype=dtype)
        raise ModelLoadError(f"ONNX Constant with attributes {sorted(attrs)} is not supported")


def _qualify(parts: Any) -> str:
    """Join exporter scopes into a module path; a scope that extends the previous one replaces it."""
    names: list[str] = []
    for part in parts:
        if names and part.startswith(names[-1] + "."):
            names[-1] = part
        else:
            names.append(part)
    return ".".join(names)


def _clean(name: str) -> str:
    parts = [re.sub(r"[^A-Za-z0-9_]", "_", p).strip("_") for p in name.split(".")]
    return ".".join(p for p in parts if p)


def _ints(v: Value) -> list[int] | None:
    if v is None:
        return None
    if isinstance(v, fx.Node):
        raise ModelLoadError("an ONNX axes/sizes input is computed at run time; Pellucid needs it constant")
    return [int(i) for i in (v.reshape(-1).tolist() if isinstance(v, torch.Tensor) else v)]


def _pairs(pads: Sequence[int] | None, n: int) -> tuple[list[int], list[int]]:
    pads = list(pads) if pads else [0] * (2 * n)
    return pads[:n], pads[n:]


# --- operators ---------------------------------------------------------------------------------------------


def _conv(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    x, w, bias = ins[0], ins[1], ins[2] if len(ins) > 2 else None
    if not isinstance(w, torch.Tensor) or w.ndim != 4 or (bias is not None and not isinstance(bias, torch.Tensor)):
        raise ModelLoadError(f"ONNX Conv {node.name!r} needs constant 2-D kernels (weights in the file)")
    kernel = list(attrs.get("kernel_shape") or w.shape[2:])
    strides = list(attrs.get("strides") or [1, 1])
    dilations = list(attrs.get("dilations") or [1, 1])
    begin, end = _pairs(attrs.get("pads"), 2)
    auto_pad = attrs.get("auto_pad", "NOTSET")
    if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
        x = b.call(_onnx_same_pad, x, kernel, strides, dilations, auto_pad == "SAME_UPPER")
        begin = end = [0, 0]
    elif auto_pad == "VALID":
        begin = end = [0, 0]
    if begin != end:
        x = b.call(_onnx_pad, x, [0, 0, *begin, 0, 0, *end])
        begin = [0, 0]
    group = int(attrs.get("group", 1))
    conv = nn.Conv2d(w.shape[1] * group, w.shape[0], kernel, stride=strides, padding=begin, dilation=dilations,
                     groups=group, bias=bias is not None)
    with torch.no_grad():
        conv.weight.copy_(w)
        if bias is not None:
            conv.bias.copy_(bias)
    return b.module(node, conv, x, weight_name=node.input[1])


def _gemm(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    a, w, c = ins[0], ins[1], ins[2] if len(ins) > 2 else None
    alpha, beta = float(attrs.get("alpha", 1.0)), float(attrs.get("beta", 1.0))
    trans_a, trans_b = int(attrs.get("transA", 0)), int(attrs.get("transB", 0))
    linear_ok = (isinstance(w, torch.Tensor) and w.ndim == 2 and not trans_a and isinstance(a, fx.Node)
                 and (c is None or (isinstance(c, torch.Tensor) and c.numel() in (1, (w.shape[0] if trans_b
                                                                                   else w.shape[1])))))
    if not linear_ok:
        return b.call(_onnx_gemm, a, w, c, alpha, beta, trans_a, trans_b)
    weight = (w if trans_b else w.t()) * alpha
    linear = nn.Linear(weight.shape[1], weight.shape[0], bias=c is not None)
    with torch.no_grad():
        linear.weight.copy_(weight)
        if c is not None:
            linear.bias.copy_((beta * c.reshape(-1)).expand(weight.shape[0]))
    return b.module(node, linear, a, weight_name=node.input[1])


def _batchnorm(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    x, scale, bias, mean, var = ins[:5]
    eps = float(attrs.get("epsilon", 1e-5))
    if not all(isinstance(t, torch.Tensor) for t in (scale, bias, mean, var)):
        return b.call(_onnx_batchnorm, x, scale, bias, mean, var, eps)
    bn = OnnxBatchNorm(scale.numel(), eps=eps)
    with torch.no_grad():
        bn.weight.copy_(scale)
        bn.bias.copy_(bias)
        bn.running_mean.copy_(mean)
        bn.running_var.copy_(var)
    return b.module(node, bn.eval(), x, weight_name=node.input[1])


def _pool(kind: str) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        x = ins[0]
        if len(node.output) > 1 and node.output[1]:
            raise ModelLoadError(f"ONNX {node.op_type} {node.name!r} returns indices, which Pellucid does not support")
        kernel = list(attrs["kernel_shape"])
        if len(kernel) != 2:
            raise ModelLoadError(f"ONNX {node.op_type} {node.name!r} pools over {len(kernel)} axes; expected 2")
        strides = list(attrs.get("strides") or [1, 1])
        dilations = list(attrs.get("dilations") or [1, 1])
        begin, end = _pairs(attrs.get("pads"), 2)
        ceil = bool(attrs.get("ceil_mode", 0))
        fill = -math.inf if kind == "max" else 0.0
        auto_pad = attrs.get("auto_pad", "NOTSET")
        if auto_pad in ("SAME_UPPER", "SAME_LOWER"):
            x = b.call(_onnx_same_pad, x, kernel, strides, dilations, auto_pad == "SAME_UPPER", fill)
            begin = end = [0, 0]
        elif auto_pad == "VALID":
            begin = end = [0, 0]
        include = bool(attrs.get("count_include_pad", 0))
        if begin != end or any(p > k // 2 for p, k in zip(begin, kernel)):
            if kind == "avg" and not include and any(begin + end):
                raise ModelLoadError(f"ONNX AveragePool {node.name!r} pads unevenly without counting the pad; "
                                     "Pellucid cannot rebuild that exactly")
            x = b.call(_onnx_pad, x, [0, 0, *begin, 0, 0, *end], "constant", fill)
            begin = [0, 0]
        if kind == "max":
            module: nn.Module = nn.MaxPool2d(kernel, strides, begin, dilations, ceil_mode=ceil)
        else:
            if dilations != [1, 1]:
                raise ModelLoadError(f"ONNX AveragePool {node.name!r} is dilated; Pellucid cannot rebuild that")
            module = nn.AvgPool2d(kernel, strides, begin, ceil_mode=ceil, count_include_pad=include)
        return b.module(node, module, x)

    return build


def _global_pool(kind: str) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        return b.module(node, nn.AdaptiveAvgPool2d(1) if kind == "avg" else nn.AdaptiveMaxPool2d(1), ins[0])

    return build


def _activation(make: Callable[[dict[str, Any]], nn.Module]) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        module = make(attrs)
        if isinstance(ins[0], torch.Tensor):
            return b.call(module, ins[0])
        return b.module(node, module, ins[0])

    return build


def _hard_sigmoid(attrs: dict[str, Any]) -> nn.Module:
    alpha, beta = float(attrs.get("alpha", 0.2)), float(attrs.get("beta", 0.5))
    if math.isclose(alpha, 1 / 6, rel_tol=1e-6) and beta == 0.5:
        return nn.Hardsigmoid()
    return _Affine(alpha, beta)


class _Affine(nn.Module):
    """ONNX HardSigmoid with its own slope and offset: max(0, min(1, alpha·x + beta))."""

    def __init__(self, alpha: float, beta: float) -> None:
        super().__init__()
        self.alpha, self.beta = alpha, beta

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.clamp(self.alpha * x + self.beta, 0.0, 1.0)


def _clip(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    lo = ins[1] if len(ins) > 1 else attrs.get("min")
    hi = ins[2] if len(ins) > 2 else attrs.get("max")
    if isinstance(lo, fx.Node) or isinstance(hi, fx.Node):
        return b.call(torch.clamp, ins[0], lo, hi)
    lo_v = float(lo) if lo is not None else None
    hi_v = float(hi) if hi is not None else None
    if lo_v == 0.0 and hi_v == 6.0 and isinstance(ins[0], fx.Node):
        return b.module(node, nn.ReLU6(), ins[0])
    if lo_v == 0.0 and hi_v is None and isinstance(ins[0], fx.Node):
        return b.module(node, nn.ReLU(), ins[0])
    return b.call(torch.clamp, ins[0], lo_v, hi_v)


def _binary(fn: Callable) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        return b.call(fn, ins[0], ins[1])

    return build


def _unary(fn: Callable) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        return b.call(fn, ins[0])

    return build


def _variadic(fn: Callable) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        out = ins[0]
        for other in ins[1:]:
            out = b.call(fn, out, other)
        return out

    return build


def _passthrough(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return ins[0]


def _flatten(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return b.call(_onnx_flatten, ins[0], int(attrs.get("axis", 1)))


def _reshape(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    shape = ins[1] if len(ins) > 1 else attrs.get("shape")
    if isinstance(shape, torch.Tensor):
        shape = [int(v) for v in shape.tolist()]
    return b.call(_onnx_reshape, ins[0], shape, int(attrs.get("allowzero", 0)))


def _reduce(op: str) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        axes = attrs.get("axes")
        if axes is None and len(ins) > 1:
            axes = _ints(ins[1])
        if not axes and attrs.get("noop_with_empty_axes", 0):
            return ins[0]
        return b.call(_onnx_reduce, ins[0], op, list(axes) if axes else None, int(attrs.get("keepdims", 1)))

    return build


def _concat(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    axis = int(attrs["axis"])
    if all(isinstance(v, torch.Tensor) for v in ins):
        return torch.cat(ins, dim=axis)
    return b.graph.call_function(torch.cat, ([b.arg(v) for v in ins],), {"dim": axis})


def _transpose(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    perm = attrs.get("perm")
    return b.call(_onnx_transpose, ins[0], list(perm) if perm is not None else None)


def _softmax(log: bool) -> Callable:
    def build(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
        legacy = b.opset < 13
        axis = int(attrs.get("axis", 1 if legacy else -1))
        return b.call(_onnx_softmax, ins[0], axis, legacy, log)

    return build


def _squeeze(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    axes = attrs.get("axes") if "axes" in attrs else _ints(ins[1] if len(ins) > 1 else None)
    return b.call(_onnx_squeeze, ins[0], list(axes) if axes is not None else None)


def _unsqueeze(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    axes = attrs.get("axes") if "axes" in attrs else _ints(ins[1])
    return b.call(_onnx_unsqueeze, ins[0], list(axes))


def _slice(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    if "starts" in attrs:  # opset < 10
        starts, ends, axes, steps = attrs["starts"], attrs["ends"], attrs.get("axes"), None
    else:
        starts, ends = ins[1], ins[2]
        axes = ins[3] if len(ins) > 3 else None
        steps = ins[4] if len(ins) > 4 else None
    return b.call(_onnx_slice, ins[0], starts, ends, axes, steps)


def _split(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    axis = int(attrs.get("axis", 0))
    sizes = attrs.get("split") or (ins[1] if len(ins) > 1 else None)
    if sizes is not None:
        parts = b.call(_onnx_split, ins[0], sizes, axis)
    else:
        parts = b.call(_onnx_split_even, ins[0], int(attrs.get("num_outputs", len(node.output))), axis)
    if isinstance(parts, tuple):
        return list(parts)
    return [b.graph.call_function(operator.getitem, (parts, i)) for i in range(len(node.output))]


def _shape(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    start, end = int(attrs.get("start", 0)), attrs.get("end")
    return b.call(_onnx_shape, ins[0], start, int(end) if end is not None else None)


def _gather(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return b.call(_onnx_gather, ins[0], ins[1], int(attrs.get("axis", 0)))


def _cast(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    import onnx

    np_dtype = onnx.helper.tensor_dtype_to_np_dtype(int(attrs["to"]))
    dtype = {"float32": torch.float32, "float64": torch.float32, "float16": torch.float32, "int64": torch.int64,
             "int32": torch.int32, "bool": torch.bool, "int8": torch.int8, "uint8": torch.uint8}.get(str(np_dtype))
    if dtype is None:
        raise ModelLoadError(f"ONNX Cast to {np_dtype} is not supported")
    return b.call(_to_dtype, ins[0], dtype)


def _to_dtype(x: torch.Tensor, dtype: torch.dtype) -> torch.Tensor:
    return x.to(dtype)


def _pad(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    mode = attrs.get("mode", "constant")
    if "pads" in attrs:  # opset < 11
        pads, value, axes = list(attrs["pads"]), float(attrs.get("value", 0.0)), None
    else:
        pads = _ints(ins[1])
        value = float(ins[2].item()) if len(ins) > 2 and isinstance(ins[2], torch.Tensor) else 0.0
        axes = _ints(ins[3]) if len(ins) > 3 else None
    return b.call(_onnx_pad, ins[0], pads, mode, value, axes)


def _expand(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return b.call(_onnx_expand, ins[0], ins[1])


def _constant_of_shape(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    value = b.tensor(attrs["value"]) if "value" in attrs else None
    return b.call(_onnx_constant_of_shape, ins[0], value)


def _layer_norm(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    if len(node.output) > 1 and any(node.output[1:]):
        raise ModelLoadError(f"ONNX LayerNormalization {node.name!r} returns its statistics; not supported")
    return b.call(_onnx_layer_norm, ins[0], ins[1], ins[2] if len(ins) > 2 else None,
                  int(attrs.get("axis", -1)), float(attrs.get("epsilon", 1e-5)))


def _gelu(attrs: dict[str, Any]) -> nn.Module:
    return nn.GELU(approximate="tanh" if attrs.get("approximate", "none") == "tanh" else "none")


def _where(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return b.call(torch.where, ins[0], ins[1], ins[2])


def _tile(b: _Builder, node: Any, ins: list[Value], attrs: dict[str, Any]) -> Value:
    return b.call(torch.tile, ins[0], _ints(ins[1]))


_OPS: dict[str, Callable[[_Builder, Any, list[Value], dict[str, Any]], Any]] = {
    "Conv": _conv,
    "Gemm": _gemm,
    "BatchNormalization": _batchnorm,
    "MaxPool": _pool("max"),
    "AveragePool": _pool("avg"),
    "GlobalAveragePool": _global_pool("avg"),
    "GlobalMaxPool": _global_pool("max"),
    "Relu": _activation(lambda a: nn.ReLU()),
    "Sigmoid": _activation(lambda a: nn.Sigmoid()),
    "Tanh": _activation(lambda a: nn.Tanh()),
    "HardSwish": _activation(lambda a: nn.Hardswish()),
    "HardSigmoid": _activation(_hard_sigmoid),
    "LeakyRelu": _activation(lambda a: nn.LeakyReLU(float(a.get("alpha", 0.01)))),
    "Elu": _activation(lambda a: nn.ELU(float(a.get("alpha", 1.0)))),
    "Selu": _activation(lambda a: nn.SELU()),
    "Softplus": _activation(lambda a: nn.Softplus()),
    "Gelu": _activation(_gelu),
    "Mish": _activation(lambda a: nn.Mish()),
    "Clip": _clip,
    "Identity": _passthrough,
    "Dropout": _passthrough,
    "Add": _binary(torch.add),
    "Sub": _binary(torch.sub),
    "Mul": _binary(torch.mul),
    "Div": _binary(_onnx_div),
    "Pow": _binary(torch.pow),
    "MatMul": _binary(torch.matmul),
    "Equal": _binary(torch.eq),
    "Less": _binary(torch.lt),
    "Greater": _binary(torch.gt),
    "Max": _variadic(torch.maximum),
    "Min": _variadic(torch.minimum),
    "Sum": _variadic(torch.add),
    "Sqrt": _unary(torch.sqrt),
    "Exp": _unary(torch.exp),
    "Log": _unary(torch.log),
    "Neg": _unary(torch.neg),
    "Abs": _unary(torch.abs),
    "Erf": _unary(torch.erf),
    "Reciprocal": _unary(torch.reciprocal),
    "Floor": _unary(torch.floor),
    "Ceil": _unary(torch.ceil),
    "Not": _unary(torch.logical_not),
    "Flatten": _flatten,
    "Reshape": _reshape,
    "ReduceMean": _reduce("mean"),
    "ReduceSum": _reduce("sum"),
    "ReduceMax": _reduce("max"),
    "ReduceMin": _reduce("min"),
    "ReduceSumSquare": _reduce("sumsquare"),
    "ReduceL2": _reduce("l2"),
    "Concat": _concat,
    "Transpose": _transpose,
    "Softmax": _softmax(log=False),
    "LogSoftmax": _softmax(log=True),
    "Squeeze": _squeeze,
    "Unsqueeze": _unsqueeze,
    "Slice": _slice,
    "Split": _split,
    "Shape": _shape,
    "Gather": _gather,
    "Cast": _cast,
    "Pad": _pad,
    "Expand": _expand,
    "ConstantOfShape": _constant_of_shape,
    "LayerNormalization": _layer_norm,
    "Where": _where,
    "Tile": _tile,
    "Constant": _passthrough,  # handled in the builder; listed so the scan accepts it
}

SUPPORTED_OPS: tuple[str, ...] = tuple(sorted(_OPS))


def convert_onnx(model: Any) -> fx.GraphModule:
    """Rebuild an in-memory ``onnx.ModelProto`` as a torch module (N, C, H, W) → outputs; see the module doc."""
    return _Builder(model).build()


def load_onnx(path: Path) -> fx.GraphModule:
    """Read an ONNX file (and any external weight files beside it) and rebuild it as a torch module."""
    try:
        import onnx
    except ImportError:
        raise ModelLoadError(
            "kind = \"onnx\" needs the optional package onnx: pip install 'pellucid[onnx]'"
        ) from None
    try:
        model = onnx.load(str(path))
    except Exception as exc:  # noqa: BLE001 - protobuf and file errors mean the same to the user
        detail = str(exc).strip().splitlines()[0][:200] if str(exc).strip() else type(exc).__name__
        raise ModelLoadError(f"{str(path)!r} is not a readable ONNX file ({detail})") from None
    if not model.graph.node:
        raise ModelLoadError(f"{str(path)!r} holds no ONNX graph (no nodes)")
    return convert_onnx(model)
