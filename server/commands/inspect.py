"""``pellucid inspect``: every single-image view, headless, written to a folder."""

from __future__ import annotations

import argparse
import json
import math
import time
from pathlib import Path
from typing import Any

from pellucid.commands._progress import ProgressBar

CAUTION = (
    "Attribution maps are evidence about this model on this image, not proof of what it has learned; "
    "deployment decisions follow the reviewer's domain rules and sign-off."
)
# Pictures of the input, overlays and maps are enlarged by pixel repetition (nearest neighbour, no
# smoothing, so every model pixel stays a crisp square) until the long side reaches this many pixels.
READABLE_SIDE = 384


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "inspect",
        help="write kernels, activations, top-k and attribution maps for one image",
        description=(
            "Run one image through a model and write what Pellucid sees into --out: the preprocessed input, "
            "top-k classes, the first conv layer's kernels, a layer's activation grid, an occlusion map and "
            "any other attribution method asked for, plus result.json with every setting and fingerprint."
        ),
    )
    p.add_argument("image", type=Path, nargs="?", help="the image file (PNG, JPEG, GIF, BMP, TIFF or WebP)")
    p.add_argument("--model", default="tilenet", metavar="SPEC",
                   help="model spec file or bundled model name (default: tilenet, the demo model)")
    p.add_argument("--out", type=Path, metavar="DIR", help="folder to write results into (required with an image)")
    p.add_argument("--layer", default=None, metavar="NAME",
                   help="layer whose activation grid to draw (default: the last conv layer)")
    p.add_argument("--sort", choices=("index", "mean", "max"), default="max",
                   help="order of channels in the activation grid (default: max)")
    p.add_argument("--top", type=int, default=5, metavar="K", help="how many classes to list (default 5)")
    p.add_argument("--target", default=None, metavar="CLASS",
                   help="class to explain, by index or label (default: the model's top-1)")
    p.add_argument("--no-occlusion", dest="occlusion", action="store_false",
                   help="skip the occlusion map (it is the slowest view)")
    p.add_argument("--patch", type=int, default=None, help="occlusion patch side in px (default: an eighth of the "
                   "input's shorter side)")
    p.add_argument("--stride", type=int, default=None, help="occlusion stride in px (default: half the patch)")
    p.add_argument("--baseline", choices=("mean", "zero", "blur"), default="mean",
                   help="what fills the occluding patch (default: the image's mean colour)")
    p.add_argument("--engine", default="auto",
                   help="occlusion engine: auto (fastest exact), batched, incremental, naive, approximate")
    p.add_argument("--method", action="append", default=[], metavar="NAME",
                   help="another attribution method to run (repeatable); see --list-methods")
    p.add_argument("--param", action="append", default=[], metavar="METHOD.KEY=VALUE",
                   help="a parameter for a method, e.g. integrated_gradients.steps=128")
    p.add_argument("--faithfulness", action="store_true",
                   help="score every map by deletion and insertion curves (Petsiuk et al. 2018) and rank them")
    p.add_argument("--sanity", action="store_true",
                   help="run the cascading-randomisation sanity check (Adebayo et al. 2018) for each --method")
    p.add_argument("--list-methods", action="store_true", help="list attribution methods and their parameters")
    p.add_argument("--trust-pickled", action="store_true", help="allow specs of kind 'pickled'")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress output for the long methods")
    p.set_defaults(func=_inspect)


def _parse_params(items: list[str], methods: list[str]) -> dict[str, dict[str, str]]:
    from pellucid.core.errors import BadParameterError

    out: dict[str, dict[str, str]] = {}
    for item in items:
        key, sep, value = item.partition("=")
        method, dot, name = key.partition(".")
        if not sep or not dot or not method or not name:
            raise BadParameterError(f"--param must look like METHOD.KEY=VALUE (e.g. rise.masks=500), got {item!r}")
        if method not in methods and method != "occlusion":
            raise BadParameterError(f"--param {item!r} names method {method!r}, which is not given with --method")
        out.setdefault(method, {})[name] = value
    return out


def _list_methods() -> int:
    from pellucid.core.attribution import list_methods

    for m in list_methods():
        print(f"{m['name']}: {m.get('title') or m.get('description', '')}")
        for p in m.get("params", []):
            print(f"    {p['name']} ({p['type']}, default {p['default']!r}): {p.get('help', '')}")
    return 0


def _occlusion_params(args: argparse.Namespace, given: dict[str, str], model: Any) -> dict[str, Any] | None:
    """The occlusion map's checked settings from --patch/--stride/--baseline/--engine and --param occlusion.*.

    Every key is checked by the method's schema (unknown keys and out-of-range values are errors, never
    ignored or replaced by a default); patch and stride left unset follow the one default rule.
    """
    from pellucid.core.attribution import check_request
    from pellucid.core.errors import BadParameterError
    from pellucid.core.occlusion.positions import default_occlusion_geometry

    if not args.occlusion:
        if given:
            raise BadParameterError("--param occlusion.… was given together with --no-occlusion; drop one of them")
        return None
    flags = {k: v for k, v in (("patch", args.patch), ("stride", args.stride)) if v is not None}
    twice = sorted(set(flags) & set(given))
    if twice:
        raise BadParameterError(f"the occlusion {twice[0]} was given twice (--{twice[0]} and --param "
                                f"occlusion.{twice[0]}); give it once")
    asked = {"baseline": args.baseline, "engine": args.engine, **flags, **given}
    checked = check_request("occlusion", model.module, model.input_shape, asked)  # unknown keys, ranges
    h, w = model.spec.input.height, model.spec.input.width
    patch, stride = default_occlusion_geometry(h, w, patch=checked["patch"], stride=checked["stride"])
    return check_request("occlusion", model.module, model.input_shape, {**checked, "patch": patch, "stride": stride})


def _inspect(args: argparse.Namespace) -> int:
    """Write every view into a private folder first and move the files into --out only when all of
    them are written, so an error part way (a bad parameter found late, a failing method) leaves
    --out as it was."""
    import shutil
    import tempfile

    from pellucid.core.errors import BadParameterError

    if args.list_methods:
        return _list_methods()
    if args.image is None or args.out is None:
        raise BadParameterError("inspect needs an IMAGE and --out DIR (or --list-methods)")
    if args.out.exists() and not args.out.is_dir():
        raise BadParameterError(f"--out {str(args.out)!r} exists and is not a folder")
    with tempfile.TemporaryDirectory(prefix="pellucid-inspect-") as staging:
        code = _write_views(args, Path(staging))
        args.out.mkdir(parents=True, exist_ok=True)
        for item in sorted(Path(staging).iterdir()):
            shutil.move(str(item), str(args.out / item.name))
    return code


def _write_views(args: argparse.Namespace, out: Path) -> int:
    from pellucid.core.attribution import Normalization, check_request, compute_attribution, get_method
    from pellucid.core.errors import BadParameterError, UnsupportedLayerError
    from pellucid.core.model.bundled import resolve_model_ref
    from pellucid.core.model.layers import layer_map
    from pellucid.core.model.loading import TORCHSCRIPT_NOTE, load_model
    from pellucid.core.model.preprocess import prepare, read_image
    from pellucid.core.occlusion.engine import occlusion_map
    from pellucid.core.provenance import provenance
    from pellucid.core.views import render
    from pellucid.core.views.activations import activations_with_prediction
    from pellucid.core.views.kernels import channel_grid, kernel_view, rgb_grid

    for name in args.method:
        get_method(name)  # fail early on an unknown name
    params = _parse_params(args.param, args.method)
    if args.top < 1:
        raise BadParameterError(f"--top must be at least 1, got {args.top}")

    image = read_image(args.image)
    model = load_model(resolve_model_ref(args.model), trust_pickled=args.trust_pickled)
    for name in args.method:  # e.g. Grad-CAM on TorchScript: one sentence before any work
        check_request(name, model.module, model.input_shape, params.get(name))
    occlusion = _occlusion_params(args, params.pop("occlusion", {}), model)
    prepared = prepare(model.spec, image)
    x = prepared.tensor
    target = model.class_index(args.target) if args.target is not None else None
    written: dict[str, str] = {}
    pictures: dict[str, dict[str, Any]] = {}
    in_h, in_w = prepared.display.shape[:2]
    factor = max(1, math.ceil(READABLE_SIDE / max(in_h, in_w)))

    def save(name: str, data: bytes) -> None:
        (out / name).write_bytes(data)
        written[name.rsplit(".", 1)[0]] = name

    arrays: dict[str, dict[str, Any]] = {}

    def save_array(name: str, values: Any, meaning: str) -> None:
        """A map's numbers as float32 .npy (numpy's own format), so results can be re-checked."""
        import io

        import numpy as np

        buf = io.BytesIO()
        data = np.ascontiguousarray(values, dtype=np.float32)
        np.save(buf, data, allow_pickle=False)
        save(name, buf.getvalue())
        arrays[name] = {"shape": list(data.shape), "dtype": "float32", "meaning": meaning}

    def save_picture(name: str, image: Any, scaling: str) -> None:
        """An input-sized picture, enlarged ×factor by pixel repetition; result.json says how."""
        big = render.upscale_nearest(image, factor)
        save(name, render.encode_png(big))
        pictures[name] = {"size": [int(big.shape[0]), int(big.shape[1])], "input_size": [in_h, in_w],
                          "enlarged": factor, "resampling": "nearest neighbour (pixel repetition)",
                          "scaling": scaling}

    save_picture("input.png", prepared.display, "the model's input after resizing and cropping, before "
                 "normalisation")
    result: dict[str, Any] = {
        "tool": "pellucid",
        "provenance": provenance(),
        "caution": CAUTION,
        "model": model.summary(),
        "image": {"path": str(args.image.resolve()), "sha256": image.sha256, "size": list(image.original_size),
                  "mode": image.original_mode, "format": image.format, "notes": prepared.notes},
        "display": {"input_size": [in_h, in_w], "enlarged": factor, "readable_side": READABLE_SIDE,
                    "rule": "input-sized pictures are enlarged by the smallest whole factor that makes the long side "
                            f"at least {READABLE_SIDE} px, by pixel repetition (no smoothing)"},
    }

    lmap = None
    if model.supports_hooks:
        lmap = layer_map(model.module, input_shape=model.input_shape)
        result["layer_map"] = lmap.to_dict()
        first = lmap.first_conv()
        view = kernel_view(model.module, layer=first.name)
        try:
            grid = rgb_grid(view, zoom=None)
        except UnsupportedLayerError:
            grid = channel_grid(view, zoom=None)
        k_factor = max(1, math.ceil(READABLE_SIDE / max(grid.image.shape[:2])))
        k_image = render.upscale_nearest(grid.image, k_factor)
        save("kernels.png", render.encode_png(k_image))
        result["kernels"] = view.to_dict()
        pictures["kernels.png"] = {
            "size": [int(k_image.shape[0]), int(k_image.shape[1])], "layer": first.name, "enlarged": k_factor,
            "resampling": f"nearest neighbour, each weight drawn as {grid.zoom * k_factor}×{grid.zoom * k_factor} px "
                          f"(cells and gaps below are before the ×{k_factor} enlargement)",
            "scaling": ("each tile scaled to its own largest |weight|: 128 + 127·w / max|w|, so 0 is mid-grey; "
                        "the scales are the max|w| of each tile, in tile order") if grid.scales is not None else
                       ("one diverging scale shared by every tile, symmetric around 0, over value_range"),
            **grid.to_dict(),
        }
        layer = args.layer or lmap.last_conv().name
        acts, pred = activations_with_prediction(model.module, x, layer=layer, labels=model.labels,
                                                 output_kind=model.output_kind, k=args.top)
        grid_img, layout = render.activation_grid(acts.maps, order=acts.order(args.sort))
        save(f"activations_{_safe(layer)}.png", render.encode_png(grid_img))
        pictures[f"activations_{_safe(layer)}.png"] = {
            "size": [int(grid_img.shape[0]), int(grid_img.shape[1])], "layer": layer,
            "scaling": "each channel scaled to its own [min, max]", "layout": layout.to_dict()}
        result["activations"] = {
            "layer": layer, "sort": args.sort, "output_shape": list(acts.output_shape),
            "layout": layout.to_dict(), "scale": "each channel scaled to its own [min, max]",
            "channel_mean": [float(v) for v in acts.channel_mean],
            "channel_max": [float(v) for v in acts.channel_max],
        }
    else:
        from pellucid.core.views.predict import predict

        pred = predict(model.module, x, labels=model.labels, output_kind=model.output_kind, k=args.top)
        result["layer_views"] = TORCHSCRIPT_NOTE
    result["prediction"] = pred.to_dict()
    explained = target if target is not None else pred.top[0].index

    maps: dict[str, Any] = {}
    computed: dict[str, Any] = {}
    if occlusion is not None:
        t0 = time.perf_counter()
        occ = occlusion_map(model.module, x, target=explained, patch=occlusion["patch"], stride=occlusion["stride"],
                            baseline=occlusion["baseline"], method=occlusion["engine"],
                            output="logit" if occlusion["output"] == "logit" else model.output_kind,
                            progress=ProgressBar("occlusion", quiet=args.quiet))
        lo, hi = render.value_range(occ.drop, signed=True)
        range_text = f"diverging colours symmetric around 0 over [{lo:.4g}, {hi:.4g}] (drop in probability)"
        save_picture("occlusion_overlay.png", render.overlay(prepared.display, occ.drop, cmap=render.SIGNED_CMAP,
                                                             vmin=lo, vmax=hi), range_text + ", blended over the input")
        save_picture("occlusion_map.png", render.colorize(occ.drop, cmap=render.SIGNED_CMAP, vmin=lo, vmax=hi),
                     range_text)
        save("occlusion_colorbar.png", render.colorbar_png(
            vmin=lo, vmax=hi, cmap=render.SIGNED_CMAP, label=f"drop in p({model.labels[explained]})"))
        save_array("occlusion.npy", occ.drop, "drop in the target's score per input pixel: the mean of the grid over "
                   "every patch position covering the pixel")
        save_array("occlusion_grid.npy", occ.grid, "drop in the target's score per patch position (rows: patch tops "
                   f"{occ.tops.tolist()}, columns: patch lefts {occ.lefts.tolist()}, patch {occ.patch} px)"
                   + ("; approximate: positions not evaluated are interpolated" if occ.approximate else ""))
        maps["occlusion"] = {**occ.parameters(), "wall_seconds": time.perf_counter() - t0,
                             "label": model.labels[explained]}
        computed["occlusion"] = occ.drop
        from pellucid.core.attribution.occlusion import saturation_warning

        saturated = saturation_warning(float(occ.base_score), occ.grid, output=occ.output)
        if saturated:  # a flat map from a saturated probability says so, with the logit suggestion
            maps["occlusion"]["warning"] = saturated
            print(f"warning (occlusion): {saturated}")

    norm = Normalization(mean=model.spec.preprocess.mean, std=model.spec.preprocess.std)
    for name in args.method:
        if name == "occlusion" and occlusion is not None:
            continue  # the occlusion view above ran it, with the --param occlusion.* settings
        amap = compute_attribution(name, model.module, x, target=explained, params=params.get(name),
                                   output_kind=model.output_kind, normalization=norm,
                                   progress=ProgressBar(name, quiet=args.quiet))
        lo, hi = render.value_range(amap.map, signed=amap.signed)
        cmap = render.SIGNED_CMAP if amap.signed else render.MAGNITUDE_CMAP
        range_text = (f"diverging colours symmetric around 0 over [{lo:.4g}, {hi:.4g}]" if amap.signed
                      else f"magnitude colours over the map's [min, max] = [{lo:.4g}, {hi:.4g}]")
        save_picture(f"{name}_overlay.png", render.overlay(prepared.display, amap.map, cmap=cmap, vmin=lo, vmax=hi),
                     range_text + ", blended over the input")
        save_picture(f"{name}_map.png", render.colorize(amap.map, cmap=cmap, vmin=lo, vmax=hi), range_text)
        save_array(f"{name}.npy", amap.map,
                   f"{name} attribution per input pixel ({'signed' if amap.signed else 'magnitude'})")
        maps[name] = amap.summary()
        computed[name] = amap.map
        if amap.warning:
            print(f"warning ({name}): {amap.warning}")
    result["attribution"] = maps

    if args.faithfulness and computed:
        from pellucid.core.attribution import faithfulness, rank_methods
        from pellucid.core.views.figures import faithfulness_png

        scores = {name: faithfulness(model.module, x, amap, target=explained, output_kind=model.output_kind,
                                     progress=ProgressBar(f"faithfulness {name}", quiet=args.quiet))
                  for name, amap in computed.items()}
        save("faithfulness.png", faithfulness_png(scores, label=model.labels[explained]))
        result["faithfulness"] = {name: res.to_dict() for name, res in scores.items()}
        result["faithfulness_ranking"] = rank_methods(scores)
    if args.sanity:
        from pellucid.core.attribution import sanity_check
        from pellucid.core.views.figures import sanity_png

        checks = {}
        for name in args.method:
            check = sanity_check(name, model.module, x, target=explained, params=params.get(name),
                                 output_kind=model.output_kind, normalization=norm,
                                 progress=ProgressBar(f"sanity {name}", unit="maps", quiet=args.quiet))
            save(f"sanity_{name}.png", sanity_png(check))
            checks[name] = check.to_dict()
            print(f"sanity check {name}: {check.verdict} — {check.reason}")
        result["sanity"] = checks
    result["files"] = written
    result["arrays"] = arrays
    result["pictures"] = pictures
    (out / "result.json").write_text(json.dumps(result, indent=2, default=_json_default) + "\n", encoding="utf-8")

    top = ", ".join(f"{c.label} {c.probability:.3f}" for c in pred.top[:3])
    print(f"{args.image.name}: {top}")
    if prepared.notes:
        print("notes: " + "; ".join(prepared.notes))
    print(f"wrote {len(written) + 1} files to {args.out}")
    return 0


def _safe(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_" else "_" for c in name) or "layer"


def _json_default(value: Any) -> Any:
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, tuple):
        return list(value)
    raise TypeError(f"not JSON-able: {type(value).__name__}")
