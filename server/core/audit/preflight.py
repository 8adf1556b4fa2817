"""Checks an audit passes before anything is stored: bad input is one sentence, never a half-made run.

Every check here needs only the loaded model, the read dataset and the settings, so the CLI (exit
2), the web API (a 4xx before the job starts) and :func:`pellucid.core.audit.runner.run_audit`
(before the run row exists) refuse the same things with the same words:

- a folder with one class: an audit compares classes (accuracy, per-class evidence and the
  injection test, which pastes onto the *other* classes);
- a class with a single image: per-class means, flags and clusters need at least two images;
- dataset labels the model does not know;
- a method request the model cannot serve (a Grad-CAM layer without a 4-D map, an occlusion
  patch or stride larger than the input), through the method's own registry check;
- an injection test whose suspect class the model does not have, or whose patch is larger than
  the model's input (or lies outside it).
"""

from __future__ import annotations

from pellucid.core.attribution import check_request
from pellucid.core.audit.dataset import Dataset
from pellucid.core.audit.injection import check_patch_fits
from pellucid.core.audit.settings import AuditSettings, InjectionSpec
from pellucid.core.errors import BadParameterError, DataError
from pellucid.core.model.loading import LoadedModel

__all__ = ["MIN_IMAGES_PER_CLASS", "check_audit_inputs", "check_dataset", "check_injection"]

MIN_IMAGES_PER_CLASS = 2


def _names(labels: list[str], limit: int = 8) -> str:
    shown = ", ".join(repr(c) for c in labels[:limit])
    return shown + (f" and {len(labels) - limit} more" if len(labels) > limit else "")


def check_dataset(model: LoadedModel, dataset: Dataset) -> None:
    """The dataset has at least two classes, each with two readable images, all known to the model."""
    counts = dataset.counts()
    unknown = sorted(set(counts) - set(model.labels))
    if unknown:
        raise DataError(
            f"the dataset has label(s) {_names(unknown)} that model {model.name!r} does not know; its labels are "
            f"{_names(list(model.labels), 12)}. Rename the class folders or the manifest's labels to match"
        )
    if len(counts) < 2:
        only = next(iter(counts), "?")
        raise DataError(
            f"the dataset has one class only ({only!r}, {counts.get(only, 0)} readable image(s)); an audit compares "
            "classes, so give a folder with at least two class subfolders (or a manifest with two labels)"
        )
    single = sorted((c for c, n in counts.items() if n < MIN_IMAGES_PER_CLASS), key=lambda c: (counts[c], c))
    if single:
        raise DataError(
            f"class(es) {_names(single)} have only one readable image; per-class measures need at least "
            f"{MIN_IMAGES_PER_CLASS} images per class, so add images or leave those classes out"
        )


def check_injection(model: LoadedModel, injection: InjectionSpec) -> None:
    """The suspect class is one of the model's labels and the patch fits its input."""
    if injection.suspect_class not in model.labels:
        raise BadParameterError(
            f"the injection test's suspect class {injection.suspect_class!r} is not one of model {model.name!r}'s "
            f"labels ({_names(list(model.labels), 12)}); give one of them"
        )
    check_patch_fits(model, injection)


def check_audit_inputs(model: LoadedModel, dataset: Dataset, settings: AuditSettings, *,
                       injection: InjectionSpec | None = None) -> None:
    """Every check above; raises DataError or BadParameterError (a PellucidError) with one sentence."""
    check_dataset(model, dataset)
    check_request(settings.method, model.module, model.input_shape, settings.params)
    if injection is not None:
        check_injection(model, injection)
