"""Run an audit end to end: store the run, map the shards, summarise, run the counterfactual tests.

Phases (each reports progress on its own; ``on_phase`` hears the phase names):

1. ``images``: every image not yet stored for this run is explained and measured, shard by
   shard, and stored as it arrives (one transaction per image);
2. ``summary``: accuracy, confusion matrix, region shares, flags and per-class mean maps from
   the stored results;
3. ``discovery`` (clusters of each class's maps) and ``confirmation`` (removal and transplant of
   the most suspicious clusters' evidence), on by default (:mod:`pellucid.core.audit.discovery_phase`);
4. ``injection`` and ``background swap`` when asked for, and the ``gallery`` when a layer is given.

A rerun with the same model fingerprint, dataset hash and settings picks up an interrupted,
cancelled or failed run and computes only what is missing.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pellucid import __version__
from pellucid.core.attribution import get_method
from pellucid.core.audit.aggregate import class_mean_maps, summarise
from pellucid.core.audit.caution import CAUTION as AUDIT_CAUTION
from pellucid.core.audit.dataset import Dataset
from pellucid.core.audit.discovery_phase import run_confirmation, run_discovery
from pellucid.core.audit.engine import run_shards
from pellucid.core.audit.gallery import channel_gallery
from pellucid.core.audit.injection import background_swap_test, injection_test
from pellucid.core.audit.preflight import check_audit_inputs
from pellucid.core.audit.settings import AuditSettings, GallerySpec, InjectionSpec
from pellucid.core.audit.store import CANCELLED, DONE, FAILED, INTERRUPTED, RUNNING, RunRecord, Store
from pellucid.core.audit.worker import ShardTask
from pellucid.core.errors import BadParameterError, Cancelled, DataError, PellucidError
from pellucid.core.model.loading import LoadedModel
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.provenance import provenance
from pellucid.core.views.render import encode_png

__all__ = ["CAUTION", "AuditOutcome", "run_audit", "run_settings", "stored_inputs"]

CAUTION = AUDIT_CAUTION  # kept here too: older code imports it from the runner


@dataclass
class AuditOutcome:
    run: RunRecord
    summary: dict
    resumed: bool
    reused: int  # images found already stored and not recomputed
    computed: int
    seconds: float
    images_per_second: float | None


def run_settings(settings: AuditSettings, injection: InjectionSpec | None, gallery: GallerySpec | None,
                 background_swap: bool) -> dict:
    """The settings record stored with the run (and matched when resuming)."""
    return {
        "audit": settings.to_dict(),
        "injection": injection.to_dict() if injection else None,
        "background_swap": bool(background_swap),
        "gallery": gallery.to_dict() if gallery else None,
    }


FLAGGED_PICTURES = 24


def _model_record(model: LoadedModel) -> dict:
    """What a report needs about the model even if its files move later."""
    record = model.summary()
    path = model.spec.path
    record["spec_text"] = path.read_text(encoding="utf-8") if path and path.is_file() else None
    record["card_text"] = model.card_text()
    return record


def _flagged_pictures(model: LoadedModel, store: Store, rows: list, summary: dict, items: list[dict], *,
                      progress: ProgressFn | None, cancel: CancelToken | None) -> dict[str, str]:
    """PNG picture and overlay of the top flagged images, so reports and pages need no source files."""
    from pellucid.core.model.preprocess import prepare, read_image
    from pellucid.core.views import render

    by_rel = {r.rel: r for r in rows}
    paths = {i["rel"]: i["path"] for i in items}
    out: dict[str, str] = {}
    flagged = summary["flagged_images"][:FLAGGED_PICTURES]
    for n, entry in enumerate(flagged):
        step(n, len(flagged), progress=progress, cancel=cancel)
        row = by_rel.get(entry["rel"])
        if row is None or not row.map_hash:
            continue
        try:
            display = prepare(model.spec, read_image(paths[entry["rel"]])).display
        except PellucidError:
            continue
        amap = store.get_array(row.map_hash)
        signed = bool(row.data.get("signed"))
        lo, hi = render.value_range(amap, signed=signed)
        cmap = render.SIGNED_CMAP if signed else render.MAGNITUDE_CMAP
        out[f"flagged/{entry['rel']}/image"] = store.put_bytes(render.encode_png(display), "png")
        out[f"flagged/{entry['rel']}/overlay"] = store.put_bytes(
            render.encode_png(render.overlay(display, amap, cmap=cmap, vmin=lo, vmax=hi)), "png")
    step(len(flagged), len(flagged), progress=progress, cancel=cancel)
    return out


VISUALS = 4


def _feature_visuals(model: LoadedModel, g, gallery: GallerySpec, items: list[dict], *,
                     progress: ProgressFn | None, cancel: CancelToken | None) -> dict:
    """Feature visualisations of the most class-selective channels, seeded, with the folder's colours."""
    from pellucid.core.audit.featvis import colour_sqrt, feature_visual
    from pellucid.core.model.preprocess import prepare, read_image

    samples = []
    for item in items[:32]:
        try:
            samples.append(prepare(model.spec, read_image(item["path"])).display.reshape(-1, 3)[::7] / 255.0)
        except PellucidError:
            continue
    matrix = colour_sqrt(np.concatenate(samples)) if samples and model.spec.input.channels == 3 else None
    order = [int(c) for c in np.argsort(-g.selectivity, kind="stable")[:VISUALS]]
    h, w = model.input_shape[1:]
    out = {}
    for n, c in enumerate(order):
        step(n, len(order), progress=progress, cancel=cancel)
        out[c] = feature_visual(model.module, layer=gallery.layer, channel=c, size=(h, w),
                                channels=model.spec.input.channels, mean=model.spec.preprocess.mean,
                                std=model.spec.preprocess.std, steps=gallery.visual_steps, seed=c,
                                colour_matrix=matrix)
    step(len(order), len(order), progress=progress, cancel=cancel)
    return out


def _check_labels(model: LoadedModel, dataset: Dataset) -> None:
    unknown = sorted({i.label for i in dataset.items} - set(model.labels))
    if unknown:
        shown = ", ".join(repr(c) for c in model.labels[:12]) + (" …" if len(model.labels) > 12 else "")
        raise DataError(
            f"the dataset has label(s) {', '.join(repr(u) for u in unknown)} that model {model.name!r} does not "
            f"know; its labels are {shown}. Rename the class folders or the manifest's labels to match"
        )


def _items(dataset: Dataset) -> list[dict]:
    return [{**item.to_dict(), "path": str(item.path)} for item in dataset.items]


def run_audit(
    model: LoadedModel,
    dataset: Dataset,
    *,
    store: Store,
    settings: AuditSettings | None = None,
    injection: InjectionSpec | None = None,
    background_swap: bool = False,
    gallery: GallerySpec | None = None,
    engine: str = "local",
    workers: int = 1,
    ray_address: str | None = None,
    resume: bool = True,
    command: str | None = None,
    trust_pickled: bool = False,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
    on_phase: Callable[[str], None] | None = None,
    on_run: Callable[[RunRecord], None] | None = None,
) -> AuditOutcome:
    """Audit ``dataset`` with ``model``; returns the finished run and its summary.

    Raises Cancelled when ``cancel`` is set (the run is stored as cancelled and can be resumed).
    """
    started = time.perf_counter()
    settings = (settings or AuditSettings()).validated()
    if not model.supports_hooks and get_method(settings.method).needs_hooks:
        raise BadParameterError(f"{settings.method} is unavailable for TorchScript: needs forward hooks; audit this "
                                "model with occlusion or a gradient method (saliency, integrated_gradients)")
    _check_labels(model, dataset)
    # Bad input is refused here, before the run row exists (core/audit/preflight.py).
    check_audit_inputs(model, dataset, settings, injection=injection)
    if settings.channel_layer and settings.confirmation is not None:
        from pellucid.core.audit.channels import resolve_layer

        resolve_layer(model, settings.channel_layer)  # a layer without a 4-D map is refused before the run row
    if gallery is not None and not model.supports_hooks:
        raise BadParameterError("this model does not allow forward hooks, so no channel gallery can be built; "
                                "drop the gallery option")
    if (engine != "local" or workers > 1) and model.spec.path is None:
        raise BadParameterError("parallel engines load the model from its spec file in each worker, but this "
                                "model was not loaded from a file; use engine 'local' with one worker")
    record = run_settings(settings, injection, gallery, background_swap)
    items = _items(dataset)

    run = store.find_resumable(model_fingerprint=model.fingerprint, dataset_hash=dataset.hash,
                               settings=record) if resume else None
    resumed = run is not None
    if run is None:
        run = store.create_run(
            model_name=model.name, model_fingerprint=model.fingerprint,
            model_spec=str(model.spec.path) if model.spec.path else None, dataset_root=str(dataset.root),
            dataset_hash=dataset.hash, method=settings.method, settings=record, tool_version=__version__,
            command=command, total=len(items), dataset=dataset.summary())
    run = store.set_status(run.id, RUNNING)
    if injection is not None:  # kept from the start, so an interrupted run can be resumed from the store alone
        store.add_artefacts(run.id, {"injection/patch": store.put_bytes(encode_png(injection.patch), "png")})
    if on_run is not None:
        on_run(run)

    def phase(name: str) -> None:
        if on_phase is not None:
            on_phase(name)

    try:
        finished = store.finished_items(run.id)
        todo = [i for i in items if (i["rel"], i["sha256"]) not in finished]
        reused = len(items) - len(todo)
        phase("images")
        done = reused
        step(done, len(items), progress=progress, cancel=cancel)
        tasks = [
            ShardTask(spec_path=str(model.spec.path) if model.spec.path else "", fingerprint=model.fingerprint,
                      trust_pickled=trust_pickled, settings=settings.to_dict(),
                      items=tuple(todo[k:k + settings.shard_size]), index=n)
            for n, k in enumerate(range(0, len(todo), settings.shard_size))
        ]
        t_images = time.perf_counter()
        for outcomes in run_shards(tasks, engine=engine, workers=workers, model=model, ray_address=ray_address,
                                   cancel=cancel):
            for o in outcomes:
                map_hash = store.put_array(o.map) if o.map is not None else None
                store.add_result(run.id, item=o.item, rel=o.rel, sha256=o.sha256, label=o.label, status=o.status,
                                 data=o.data, map_hash=map_hash)
                done += 1
            step(done, len(items), progress=progress, cancel=cancel)
        image_seconds = time.perf_counter() - t_images

        phase("summary")
        rows = store.results(run.id)
        h, w = model.input_shape[1:]
        summary = summarise(rows, labels=model.labels, settings=settings, shape=(h, w))
        summary["dataset"] = dataset.summary()
        summary["model"] = _model_record(model)
        summary["provenance"] = provenance()
        if summary["done"] == 0:
            raise DataError(
                f"no image of the dataset could be audited; first problem: "
                f"{summary['failed'][0]['rel']}: {summary['failed'][0]['reason']}" if summary["failed"]
                else "no image of the dataset could be audited"
            )
        artefacts: dict[str, str] = {}
        for label, mean_map in class_mean_maps(rows, labels=model.labels, load_map=store.get_array).items():
            artefacts[f"mean_map/{label}"] = store.put_array(mean_map)
        summary["mean_maps"] = {k.split("/", 1)[1]: v for k, v in artefacts.items()}
        phase("pictures")
        artefacts.update(_flagged_pictures(model, store, rows, summary, items, progress=progress, cancel=cancel))

        phase_seconds: dict[str, float] = {}
        if settings.discovery is not None:
            phase("discovery")
            t_phase = time.perf_counter()
            discovery, found = run_discovery(model, store, rows, items, settings, progress=progress, cancel=cancel)
            artefacts.update(found)
            phase_seconds["discovery_seconds"] = time.perf_counter() - t_phase
            if settings.confirmation is not None:
                phase("confirmation")
                t_phase = time.perf_counter()
                summary["confirmation"], tested = run_confirmation(
                    model, store, rows, items, discovery, settings, progress=progress, cancel=cancel)
                artefacts.update(tested)
                phase_seconds["confirmation_seconds"] = time.perf_counter() - t_phase
            summary["discovery"] = discovery.to_dict()

        if injection is not None:
            phase("injection")
            res = injection_test(model, items, injection, progress=progress, cancel=cancel)
            summary["injection"] = res.to_dict()
            for n, (before, after) in enumerate(res.pictures.values()):
                artefacts[f"injection/example/{n}/before"] = store.put_bytes(encode_png(before), "png")
                artefacts[f"injection/example/{n}/after"] = store.put_bytes(encode_png(after), "png")
                summary["injection"]["examples"][n]["index"] = n
        if background_swap:
            phase("background swap")
            swap = background_swap_test(model, items, progress=progress, cancel=cancel)
            summary["background_swap"] = swap.to_dict() if swap is not None else None
            if swap is not None:
                for n, (before, after) in enumerate(swap.pictures.values()):
                    artefacts[f"swap/example/{n}/before"] = store.put_bytes(encode_png(before), "png")
                    artefacts[f"swap/example/{n}/after"] = store.put_bytes(encode_png(after), "png")
        if gallery is not None:
            phase("gallery")
            g = channel_gallery(model, items, layer=gallery.layer, top=gallery.top, progress=progress, cancel=cancel)
            summary["gallery"] = g.to_dict(rels=[i["rel"] for i in items])
            artefacts["gallery/patches"] = store.put_array(g.patches)
            if g.kernels is not None:
                artefacts["gallery/kernels"] = store.put_array(g.kernels.astype(np.float32))
            phase("feature visuals")
            visuals = _feature_visuals(model, g, gallery, items, progress=progress, cancel=cancel)
            summary["gallery"]["visuals"] = {str(c): v.to_dict() for c, v in visuals.items()}
            for c, v in visuals.items():
                artefacts[f"gallery/visual/{c}"] = store.put_bytes(encode_png(v.image), "png")
        computed = len(todo)
        summary["timing"] = {
            "images_computed": computed, "images_reused": reused, "image_seconds": image_seconds,
            "images_per_second": (computed / image_seconds) if computed and image_seconds > 0 else None,
            "engine": engine, "workers": workers, **phase_seconds,
        }
        summary["caution"] = CAUTION
        store.set_summary(run.id, summary, artefacts=artefacts)
        run = store.set_status(run.id, DONE)
    except Cancelled:
        store.set_status(run.id, CANCELLED, error="cancelled by the user")
        raise
    except PellucidError as exc:
        store.set_status(run.id, FAILED, error=str(exc))
        raise
    except KeyboardInterrupt:
        store.set_status(run.id, INTERRUPTED, error="interrupted (Ctrl-C); rerun the same command to resume")
        raise
    except BaseException as exc:
        store.set_status(run.id, FAILED, error=f"{type(exc).__name__}: {exc}")
        raise
    return AuditOutcome(run=run, summary=summary, resumed=resumed, reused=reused, computed=computed,
                        seconds=time.perf_counter() - started,
                        images_per_second=summary["timing"]["images_per_second"])


def stored_inputs(store: Store, run: RunRecord) -> tuple[AuditSettings, InjectionSpec | None, GallerySpec | None, bool]:
    """The settings a stored run was started with, rebuilt so that it can be resumed."""
    import io

    from PIL import Image

    record = run.settings
    settings = AuditSettings.from_dict(record["audit"])
    injection = None
    if record.get("injection"):
        inj = record["injection"]
        digest = store.run_artefacts(run.id).get("injection/patch")
        if digest is None:
            raise DataError(f"run {run.id} has lost its injection patch; start a new run instead")
        patch = np.asarray(Image.open(io.BytesIO(store.get_bytes(digest))).convert("RGB"), dtype=np.uint8).copy()
        at = inj["at"] if inj["at"] == "random" else tuple(inj["at"])
        injection = InjectionSpec(patch=patch, suspect_class=inj["suspect_class"], at=at,
                                  source=inj.get("source", "given"), limit=inj.get("limit"), seed=inj.get("seed", 0))
    gallery = GallerySpec(**record["gallery"]) if record.get("gallery") else None
    return settings, injection, gallery, bool(record.get("background_swap"))
