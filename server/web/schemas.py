"""Request and response bodies of the JSON API (they also give the OpenAPI schema at /docs).

Pictures travel inside the JSON as ``data:image/png;base64,…`` URLs, so one request gives a page
everything it shows and nothing is fetched from anywhere else.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field

CAUTION = (
    "These maps are evidence about this model on these images, not proof of what it has learned or "
    "will do. Deployment decisions follow the reviewer's own domain rules and sign-off."
)


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


# --- models -------------------------------------------------------------------------------------


class ModelListEntry(BaseModel):
    name: str
    description: str
    loaded: bool
    default: bool
    has_samples: bool


class ModelList(BaseModel):
    default: str | None
    models: list[ModelListEntry]
    spec_errors: dict[str, str]


class ModelSummary(BaseModel):
    name: str
    description: str
    fingerprint: str = Field(description="sha256 of the weights file (or of the state_dict when there is none)")
    weights_path: str | None
    supports_hooks: bool
    num_classes: int
    labels: list[str]
    input_shape: list[int] = Field(description="(C, H, W) the model takes")
    output_kind: str
    notes: list[str]
    spec: dict[str, Any]
    card: str | None
    load_seconds: float
    conv_layers: list[str]


class LayerRow(BaseModel):
    name: str
    type: str
    kind: str
    output_shape: list[int] | None
    params: int
    macs: int | None
    calls: int
    is_conv: bool
    rf_size: list[int] | None
    rf_jump: list[int] | None
    rf_start: list[float] | None
    rf_global: bool
    rf_multipath: bool
    notes: list[str]


class LayerMapResponse(BaseModel):
    model: str
    fingerprint: str
    input_shape: list[int]
    total_params: int
    total_macs: int
    seconds: float
    notes: list[str]
    rows: list[LayerRow]
    feature_layers: list[str] = Field(description="leaf layers with (C, h, w) outputs: the activation layer picker")
    default_feature_layer: str | None


class DuplicatePair(BaseModel):
    a: int
    b: int
    cosine: float


class KernelsResponse(BaseModel):
    model: str
    layer: str
    layer_type: str
    view: str = Field(description="'rgb' (one RGB tile per filter) or 'channels' (filter × input channel)")
    weight_shape: list[int]
    groups: int
    png: str
    rows: int
    cols: int
    cell: list[int]
    gap: int
    zoom: int
    filters: list[int]
    channels: list[int]
    value_range: list[float] | None
    colorbar: str | None
    norms: list[float]
    median_norm: float
    dead: list[int]
    dead_rule: str
    near_duplicates: list[DuplicatePair]
    duplicates_total: int
    duplicate_rule: str
    conv_layers: list[str]
    explanation: str


# --- images -------------------------------------------------------------------------------------


class ImageInfo(BaseModel):
    id: str = Field(description="sha256 of the image bytes")
    name: str
    original_size: list[int] = Field(description="(width, height) as stored")
    original_mode: str
    format: str | None
    notes: list[str]
    link: str | None = Field(None, description="the image page with this image open")
    thumbnail: str | None = Field(None, description="URL of a small PNG of the image")
    created: float | None = Field(None, description="when the store first kept it (seconds since 1970)")
    used: float | None = Field(None, description="when it was last opened")


class MapSummary(BaseModel):
    id: str
    image: str
    image_name: str
    model: str
    fingerprint: str
    method: str
    title: str
    target: int
    target_label: str
    target_source: str
    signed: bool
    params: dict[str, Any]
    engine: str | None
    warning: str | None
    seconds: float
    created: float
    checks: list[str] = Field(description="checks kept with the map: faithfulness, sanity")
    thumbnail: str
    link: str = Field(description="the image page with this map open: a link to send to a reviewer")


class MapList(BaseModel):
    image: str
    model: str | None
    maps: list[MapSummary]


class PreparedView(BaseModel):
    image: str
    model: str
    png: str = Field(description="the input exactly as the model sees it, after resize/crop")
    size: list[int] = Field(description="(height, width)")
    notes: list[str]


class FolderEntry(BaseModel):
    name: str
    path: str
    kind: str = Field(description="'folder' or 'image'")
    size: int | None = None


class FolderListing(BaseModel):
    root_name: str
    path: str
    parent: str | None
    entries: list[FolderEntry]
    truncated: bool


class OpenFromFolder(_Strict):
    path: str = Field(description="path of an image inside the image folder, relative to it")


class SampleEntry(BaseModel):
    name: str
    thumbnail: str


class SampleList(BaseModel):
    model: str
    samples: list[SampleEntry]


class OpenSample(_Strict):
    model: str
    name: str


# --- inspection ---------------------------------------------------------------------------------


class PredictRequest(_Strict):
    model: str | None = None
    image: str
    k: int = Field(5, ge=1, le=1000)


class ClassScoreOut(BaseModel):
    index: int
    label: str
    probability: float
    logit: float


class PredictResponse(BaseModel):
    model: str
    fingerprint: str
    image: str
    output_kind: str
    top: list[ClassScoreOut]
    margin: float
    entropy_bits: float
    seconds: float


class ActivationsRequest(_Strict):
    model: str | None = None
    image: str
    layer: str
    sort: str = Field("index", description="index, mean or max (largest first)")
    max_channels: int = Field(512, ge=1, le=4096)


class ActivationsResponse(BaseModel):
    model: str
    image: str
    layer: str
    output_shape: list[int]
    channels_total: int
    sort: str
    png: str
    layout: dict[str, Any] = Field(description="channels (in grid order), cols, rows, cell, gap in px")
    channel_mean: list[float]
    channel_max: list[float]
    seconds: float
    render_seconds: float


class ChannelRequest(_Strict):
    model: str | None = None
    image: str
    layer: str
    channel: int = Field(ge=0)


class ChannelResponse(BaseModel):
    model: str
    image: str
    layer: str
    channel: int
    image_png: str
    map_png: str
    colorbar: str
    vmin: float
    vmax: float
    values: list[list[float]] = Field(description="(h, w) activation values, row-major, for the hover read-out")
    mean: float
    max: float


# --- methods, jobs and results ------------------------------------------------------------------


class MethodList(BaseModel):
    methods: list[dict[str, Any]]


class JobRequest(_Strict):
    model: str | None = None
    image: str
    method: str = "occlusion"
    target: int | str | None = Field(None, description="class index or label; default the top-1 class")
    params: dict[str, Any] = Field(default_factory=dict)


class JobStatus(BaseModel):
    id: str
    kind: str
    description: str
    state: str = Field(description="queued, running, done, failed or cancelled")
    done: int
    total: int
    unit: str = Field("steps", description="what done and total count: patch positions, masks, maps, images, …")
    fraction: float
    seconds_left: float | None
    left_from: str | None = Field(None, description="'rate' (measured so far) or 'estimate' (before any unit "
                                                    "finished: the estimate minus the time elapsed)")
    estimate_seconds: float | None = Field(None, description="what the job was estimated to take when it started")
    elapsed: float
    error: str | None
    result_id: str | None
    cached: bool = False
    lane: str = "interactive"
    created: float | None = None
    started: float | None = Field(None, description="when it began running (seconds since 1970)")
    finished: float | None = Field(None, description="when it ended (seconds since 1970)")
    model: str | None = None
    image: str | None = Field(None, description="the image the job works on (sha256)")
    image_name: str | None = None
    method: str | None = None
    run_id: str | None = Field(None, description="audits: the stored run")
    phase: str | None = Field(None, description="audits: the phase running now")
    link: str | None = Field(None, description="where the job's subject or result is shown")


class JobList(BaseModel):
    jobs: list[JobStatus] = Field(description="newest first: queued and running jobs, then finished ones")
    active: int = Field(description="jobs queued or running")


class ResultResponse(BaseModel):
    id: str
    link: str = Field(description="the image page with this map open: a link to send to a reviewer")
    model: str
    fingerprint: str
    image: str
    image_name: str
    method: str
    title: str
    target: int
    target_label: str
    target_source: str
    signed: bool
    engine: str | None
    approximate: bool
    params: dict[str, Any]
    extras: dict[str, Any]
    warning: str | None
    seconds: float
    n_forwards: int
    n_backwards: int
    value_label: str = Field(description="what one value of the map means, with its unit")
    unit: str = Field("", description="the unit alone, as the colour bar states it")
    vmin: float
    vmax: float
    cmap: str
    image_png: str
    map_png: str
    colorbar: str
    values: list[list[float]] = Field(description="(H, W) map values at input resolution, for the hover read-out")
    caution: str = CAUTION
    faithfulness: dict[str, Any] | None = Field(None, description="deletion/insertion curves and AUCs, once scored")
    sanity: dict[str, Any] | None = Field(None, description="cascading-randomisation verdict and steps, once run")


class CheckEstimateResponse(BaseModel):
    result_id: str
    check: str = Field(description="faithfulness or sanity")
    units: str = Field(description="what the check's progress counts: curve points or maps")
    count: int
    forwards: float = Field(description="work in forward-pass equivalents")
    seconds: float | None = Field(description="forwards × one measured forward on this server")
    done: bool = Field(description="true when the check is already kept with the map (served at once)")


class Ranking(BaseModel):
    rows: list[dict[str, Any]] = Field(description="best first: deletion AUC (lower better), insertion AUC (higher)")


class SharedScale(BaseModel):
    results: list[str]
    signed: bool
    vmin: float
    vmax: float
