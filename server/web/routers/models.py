"""Models on offer: list, load (summary, spec, fingerprint, card), layer map, kernels; and the spec
files of the ``--models`` folder, from which a page may add a model while the server runs (by file
name only: a request never names a path outside that folder)."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Query, Response
from pydantic import BaseModel, Field

from pellucid.core.errors import NotFoundError, PellucidError
from pellucid.core.model.spec_folder import list_spec_files, open_spec_file
from pellucid.core.views import render
from pellucid.core.views.kernels import channel_grid, kernel_view, rgb_grid
from pellucid.web.deps import get_workspace
from pellucid.web.routers._media import data_url
from pellucid.web.schemas import KernelsResponse, LayerMapResponse, LayerRow, ModelList, ModelListEntry, ModelSummary
from pellucid.web.workspace import Workspace

router = APIRouter(prefix="/api/models", tags=["models"])
specs_router = APIRouter(prefix="/api/model-specs", tags=["models"])


@router.get("", response_model=ModelList, summary="The models this server can serve")
def list_models(ws: Workspace = Depends(get_workspace)) -> ModelList:
    loaded = ws.loaded()
    default = next(iter(ws.specs), None)
    return ModelList(
        default=default,
        models=[
            ModelListEntry(
                name=name,
                description=spec.description,
                loaded=name in loaded,
                default=name == default,
                has_samples=(spec.base_dir / "samples").is_dir(),
            )
            for name, spec in ws.specs.items()
        ],
        spec_errors=ws.spec_errors,
    )


@router.get("/{name}", response_model=ModelSummary, summary="Load a model (on first use) and describe it")
def get_model(name: str, ws: Workspace = Depends(get_workspace)) -> ModelSummary:
    lm = ws.model(name)
    from pellucid.core.model.layers import conv_layer_names

    s = lm.summary()
    return ModelSummary(
        name=s["name"],
        description=s["description"],
        fingerprint=s["fingerprint"],
        weights_path=s["weights_path"],
        supports_hooks=s["supports_hooks"],
        num_classes=s["num_classes"],
        labels=list(lm.labels),
        input_shape=s["input_shape"],
        output_kind=s["output_kind"],
        notes=s["notes"],
        spec=s["spec"],
        card=lm.card_text(),
        load_seconds=lm.load_seconds,
        conv_layers=conv_layer_names(lm.module),
    )


@router.get("/{name}/layers", response_model=LayerMapResponse, summary="The layer map of a model")
def get_layers(name: str, ws: Workspace = Depends(get_workspace)) -> LayerMapResponse:
    lm = ws.model(name)
    lmap = ws.layer_map(lm)
    rows = [
        LayerRow(
            name=r.name, type=r.type, kind=r.kind,
            output_shape=list(r.output_shape) if r.output_shape else None,
            params=r.params, macs=r.macs, calls=r.calls, is_conv=r.is_conv,
            rf_size=list(r.rf_size) if r.rf_size else None,
            rf_jump=list(r.rf_jump) if r.rf_jump else None,
            rf_start=list(r.rf_start) if r.rf_start else None,
            rf_global=r.rf_global, rf_multipath=r.rf_multipath, notes=list(r.notes),
        )
        for r in lmap.rows
    ]
    feature = [r.name for r in lmap.rows if r.is_leaf and r.calls > 0 and r.output_shape and len(r.output_shape) == 4]
    default = None
    try:
        last = lmap.last_conv().name
        default = last if last in feature else (feature[-1] if feature else None)
    except Exception:  # noqa: BLE001 - a model without convolutions still has a layer map
        default = feature[-1] if feature else None
    return LayerMapResponse(
        model=lm.name, fingerprint=lm.fingerprint, input_shape=list(lmap.input_shape),
        total_params=lmap.total_params, total_macs=lmap.total_macs, seconds=lmap.seconds,
        notes=list(lmap.notes), rows=rows, feature_layers=feature, default_feature_layer=default,
    )


@router.get("/{name}/kernels", response_model=KernelsResponse, summary="A conv layer's kernels as a grid")
def get_kernels(
    name: str,
    layer: str | None = Query(None, description="qualified conv layer name; default the first conv layer"),
    filter_index: int | None = Query(None, ge=0, alias="filter", description="per-channel view of this filter only"),
    ws: Workspace = Depends(get_workspace),
) -> KernelsResponse:
    lm = ws.model(name)
    from pellucid.core.model.layers import conv_layer_names

    view = kernel_view(lm.module, layer=layer)
    rgb = view.groups == 1 and view.weights.shape[1] == 3 and filter_index is None
    if rgb:
        grid = rgb_grid(view, zoom=None)
        colorbar = None
        explanation = (
            "Each tile is one filter's 3-channel kernel shown as colour: mid-grey is zero, each tile is "
            "scaled to its own largest weight."
        )
    else:
        grid = channel_grid(view, filter_index=filter_index, zoom=None)
        lo, hi = grid.value_range or (-1.0, 1.0)
        colorbar = data_url(render.colorbar_png(vmin=lo, vmax=hi, cmap=render.SIGNED_CMAP, label="weight"))
        explanation = (
            "One row per filter, one column per input channel it reads; one diverging colour scale "
            "centred at zero is shared by every cell."
        )
    d = view.to_dict()
    return KernelsResponse(
        model=lm.name, layer=view.layer, layer_type=view.layer_type, view="rgb" if rgb else "channels",
        weight_shape=d["weight_shape"], groups=view.groups, png=data_url(render.encode_png(grid.image)),
        rows=grid.rows, cols=grid.cols, cell=list(grid.cell), gap=grid.gap, zoom=grid.zoom,
        filters=grid.filters, channels=grid.channels,
        value_range=list(grid.value_range) if grid.value_range else None, colorbar=colorbar,
        norms=d["norms"], median_norm=d["median_norm"], dead=d["dead"], dead_rule=d["dead_rule"],
        near_duplicates=d["near_duplicates"], duplicates_total=d["duplicates_total"],
        duplicate_rule=d["duplicate_rule"], conv_layers=conv_layer_names(lm.module), explanation=explanation,
    )


class SpecFileEntry(BaseModel):
    file: str = Field(description="its name in the models folder")
    name: str | None = Field(description="the model it describes (None when it cannot be read)")
    description: str
    error: str | None = Field(description="why it cannot be used, in one sentence")
    served: bool = Field(description="a model of this name is already on offer")


class SpecFileList(BaseModel):
    available: bool = Field(description="the server was started with --models DIR")
    folder: str | None = Field(description="the folder's own name (not its full path)")
    specs: list[SpecFileEntry]


class AddSpec(BaseModel):
    file: str = Field(description="a spec file's name as GET /api/model-specs lists it, e.g. 'resnet/spec.toml'")


class AddedModel(BaseModel):
    name: str
    description: str
    file: str
    added: bool = Field(description="False when this spec file was already served")


def _models_dir(ws: Workspace):
    folder = ws.settings.models_dir
    if folder is None:
        raise NotFoundError("this server has no models folder; start it with --models DIR to add models from "
                            "the pages")
    return folder


@specs_router.get("", response_model=SpecFileList, summary="The spec files a model can be added from (--models DIR)")
def list_spec_folder(ws: Workspace = Depends(get_workspace)) -> SpecFileList:
    folder = ws.settings.models_dir
    if folder is None:
        return SpecFileList(available=False, folder=None, specs=[])
    entries = [SpecFileEntry(**f.to_dict(), served=f.name in ws.specs) for f in list_spec_files(folder)]
    return SpecFileList(available=True, folder=folder.name, specs=entries)


@specs_router.post("", response_model=AddedModel, status_code=201,
                   summary="Serve one more model from a spec file of the models folder (loaded and checked "
                           "first; 200 when it is already served)")
def add_from_spec_folder(body: AddSpec, response: Response, ws: Workspace = Depends(get_workspace)) -> AddedModel:
    spec = open_spec_file(_models_dir(ws), body.file)
    already = spec.name in ws.specs
    added = ws.add_spec(spec.path)  # 409 when the name is taken by another spec file
    if already:
        response.status_code = 200
    if not already:
        try:
            ws.model(added.name)  # a spec that parses but does not load is refused now, not on first use
        except PellucidError:
            ws.specs.pop(added.name, None)
            raise
    return AddedModel(name=added.name, description=added.description, file=body.file, added=not already)
