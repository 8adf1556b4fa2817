"""One image through one model: top-k, a layer's activation grid, one channel enlarged."""

from __future__ import annotations

import time

import numpy as np
from fastapi import APIRouter, Depends

from pellucid.core.errors import BadParameterError, PellucidError
from pellucid.core.views import render
from pellucid.core.views.activations import activation_maps, activations_with_prediction
from pellucid.core.views.predict import predict
from pellucid.web.deps import get_workspace
from pellucid.web.routers._media import data_url, rounded_rows
from pellucid.web.schemas import (
    ActivationsRequest,
    ActivationsResponse,
    ChannelRequest,
    ChannelResponse,
    ClassScoreOut,
    PredictRequest,
    PredictResponse,
)
from pellucid.web.workspace import Workspace

router = APIRouter(prefix="/api", tags=["inspect"])

_SORTS = ("index", "mean", "max")


@router.post("/predict", response_model=PredictResponse, summary="Top-k classes for one image")
def post_predict(body: PredictRequest, ws: Workspace = Depends(get_workspace)) -> PredictResponse:
    lm = ws.model(body.model)
    prep = ws.prepared(lm, body.image)
    layer = _default_layer(ws, lm)
    if layer is None:
        pred = predict(lm.module, prep.tensor, labels=lm.labels, output_kind=lm.output_kind, k=body.k)
    else:
        # The page asks for the default layer's maps next: one hooked pass serves both requests.
        acts, pred = activations_with_prediction(lm.module, prep.tensor, layer=layer, labels=lm.labels,
                                                 output_kind=lm.output_kind, k=body.k)
        ws.cache.put(("activations", lm.fingerprint, body.image, layer), acts)
    return PredictResponse(
        model=lm.name, fingerprint=lm.fingerprint, image=body.image, output_kind=pred.output_kind,
        top=[ClassScoreOut(**vars(c)) for c in pred.top], margin=pred.margin,
        entropy_bits=pred.entropy_bits, seconds=pred.seconds,
    )


def _default_layer(ws: Workspace, lm) -> str | None:
    """The layer the image page shows first (the last conv layer), or None without hooks."""
    if not lm.supports_hooks:
        return None
    try:
        return ws.layer_map(lm).last_conv().name
    except PellucidError:
        return None


def _maps(ws: Workspace, model: str | None, image: str, layer: str):
    lm = ws.model(model)
    prep = ws.prepared(lm, image)
    key = ("activations", lm.fingerprint, image, layer)
    acts = ws.cache.get(key)
    if acts is None:
        acts = activation_maps(lm.module, prep.tensor, layer=layer)
        ws.cache.put(key, acts)
    return lm, prep, acts


@router.post("/activations", response_model=ActivationsResponse,
             summary="Per-channel activation maps of one layer as a grid, sortable by mean or max")
def post_activations(body: ActivationsRequest, ws: Workspace = Depends(get_workspace)) -> ActivationsResponse:
    if body.sort not in _SORTS:
        raise BadParameterError(f"sort must be one of {', '.join(_SORTS)}; received {body.sort!r}")
    lm, _prep, acts = _maps(ws, body.model, body.image, body.layer)
    t0 = time.perf_counter()
    order = acts.order(body.sort)[: body.max_channels]
    grid, layout = render.activation_grid(acts.maps, order=order)
    png = render.encode_png(grid)
    return ActivationsResponse(
        model=lm.name, image=body.image, layer=acts.layer, output_shape=list(acts.output_shape),
        channels_total=acts.channels, sort=body.sort, png=data_url(png), layout=layout.to_dict(),
        channel_mean=[float(v) for v in acts.channel_mean], channel_max=[float(v) for v in acts.channel_max],
        seconds=acts.seconds, render_seconds=time.perf_counter() - t0,
    )


@router.post("/activations/channel", response_model=ChannelResponse,
             summary="One channel's activation map enlarged over the image, with its colour bar and values")
def post_channel(body: ChannelRequest, ws: Workspace = Depends(get_workspace)) -> ChannelResponse:
    lm, prep, acts = _maps(ws, body.model, body.image, body.layer)
    if body.channel >= acts.channels:
        raise BadParameterError(
            f"layer {acts.layer!r} has {acts.channels} channels (0..{acts.channels - 1}); "
            f"received channel {body.channel}"
        )
    values = acts.maps[body.channel]
    vmin, vmax = render.value_range(values, signed=False)
    h, w = prep.display.shape[:2]
    coloured = render.colorize(render.resize_map(values, (h, w)), cmap=render.MAGNITUDE_CMAP, vmin=vmin, vmax=vmax)
    return ChannelResponse(
        model=lm.name, image=body.image, layer=acts.layer, channel=body.channel,
        image_png=data_url(render.encode_png(prep.display)), map_png=data_url(render.encode_png(coloured)),
        colorbar=data_url(render.colorbar_png(vmin=vmin, vmax=vmax, cmap=render.MAGNITUDE_CMAP,
                                              label=f"activation, {acts.layer} channel {body.channel}")),
        vmin=vmin, vmax=vmax, values=rounded_rows(values), mean=float(np.mean(values)), max=float(np.max(values)),
    )
