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

from pellucid.core.audit.dataset import Dataset, DatasetItem, SkippedFile, load_dataset
from pellucid.core.audit.engine import ENGINES, ray_available, run_shards
from pellucid.core.audit.featvis import FeatureVisual, colour_sqrt, feature_visual
from pellucid.core.audit.gallery import ChannelGallery, channel_gallery
from pellucid.core.audit.injection import (
    InjectionResult,
    SwapResult,
    background_swap_test,
    crop_patch,
    injection_test,
    paste,
)
from pellucid.core.audit.measures import (
    CORNERS,
    REGIONS,
    ImageMeasures,
    RegionLayout,
    energy_pointing,
    measure_map,
    pointing_hit,
    region_masks,
    share_inside,
)
from pellucid.core.audit.runner import CAUTION, AuditOutcome, run_audit, run_settings
from pellucid.core.audit.settings import AuditSettings, GallerySpec, InjectionSpec

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
