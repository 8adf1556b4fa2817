"""Folder audits: does the model's evidence sit on the object, or on a shortcut?

    load_dataset(path)                          -> Dataset (folder of class subfolders or CSV manifest)
    run_audit(model, dataset, store=…, …)       -> AuditOutcome (stored run + summary)
    measure_map(amap, object_mask=…)            -> ImageMeasures (object share, pointing game, regions)
    channel_gallery(model, items, layer=…)      -> ChannelGallery (top patches per channel)
    feature_visual(module, layer=…, channel=…)  -> FeatureVisual (synthesised input for a channel)
    injection_test / background_swap_test       -> counterfactual tests on pasted patches and backgrounds

An audit is evidence about this model on these images, not proof; deployment decisions follow the
domain's own rules and sign-off.
"""

# Names load on first use (PEP 562), so commands that only read the store (runs, report) do not
# import torch and the attribution methods.
_EXPORTS = {
    "AuditOutcome": "pellucid.core.audit.runner",
    "AuditSettings": "pellucid.core.audit.settings",
    "CAUTION": "pellucid.core.audit.runner",
    "CORNERS": "pellucid.core.audit.measures",
    "ChannelGallery": "pellucid.core.audit.gallery",
    "Dataset": "pellucid.core.audit.dataset",
    "DatasetItem": "pellucid.core.audit.dataset",
    "ENGINES": "pellucid.core.audit.engine",
    "FeatureVisual": "pellucid.core.audit.featvis",
    "GallerySpec": "pellucid.core.audit.settings",
    "ImageMeasures": "pellucid.core.audit.measures",
    "InjectionResult": "pellucid.core.audit.injection",
    "InjectionSpec": "pellucid.core.audit.settings",
    "REGIONS": "pellucid.core.audit.measures",
    "RegionLayout": "pellucid.core.audit.measures",
    "SkippedFile": "pellucid.core.audit.dataset",
    "SwapResult": "pellucid.core.audit.injection",
    "background_swap_test": "pellucid.core.audit.injection",
    "channel_gallery": "pellucid.core.audit.gallery",
    "colour_sqrt": "pellucid.core.audit.featvis",
    "crop_patch": "pellucid.core.audit.injection",
    "energy_pointing": "pellucid.core.audit.measures",
    "feature_visual": "pellucid.core.audit.featvis",
    "injection_test": "pellucid.core.audit.injection",
    "load_dataset": "pellucid.core.audit.dataset",
    "measure_map": "pellucid.core.audit.measures",
    "paste": "pellucid.core.audit.injection",
    "pointing_hit": "pellucid.core.audit.measures",
    "ray_available": "pellucid.core.audit.engine",
    "region_masks": "pellucid.core.audit.measures",
    "run_audit": "pellucid.core.audit.runner",
    "run_settings": "pellucid.core.audit.runner",
    "run_shards": "pellucid.core.audit.engine",
    "share_inside": "pellucid.core.audit.measures",
}


def __getattr__(name: str):
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


__all__ = [
    "CAUTION",
    "CORNERS",
    "ENGINES",
    "REGIONS",
    "AuditOutcome",
    "AuditSettings",
    "ChannelGallery",
    "Dataset",
    "DatasetItem",
    "FeatureVisual",
    "GallerySpec",
    "ImageMeasures",
    "InjectionResult",
    "InjectionSpec",
    "RegionLayout",
    "SkippedFile",
    "SwapResult",
    "background_swap_test",
    "channel_gallery",
    "colour_sqrt",
    "crop_patch",
    "energy_pointing",
    "feature_visual",
    "injection_test",
    "load_dataset",
    "measure_map",
    "paste",
    "pointing_hit",
    "ray_available",
    "region_masks",
    "run_audit",
    "run_settings",
    "run_shards",
    "share_inside",
]
