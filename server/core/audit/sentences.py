"""Sentences the CLI, the report and the audits page share, written for any model and any folder.

Torch-free on purpose: commands that only read the store import it without loading a model.
Words about "the object" appear only when the folder came with boxes or masks.
"""

from __future__ import annotations

__all__ = ["has_objects", "injection_sentence", "off_object", "unreadable_images"]


def has_objects(summary: dict) -> bool:
    """Whether any audited image came with an object box or mask."""
    return bool((summary.get("object") or {}).get("images"))


def off_object(with_objects: bool) -> str:
    """The qualifier for evidence outside the annotated object, empty when no boxes or masks were given."""
    return " off the annotated object" if with_objects else ""


def injection_sentence(inj: dict) -> str:
    """One sentence with the flip rate and every count it rests on (CLI, runs show, report, page)."""
    c = inj["settings"]["suspect_class"]
    rate = "n/a" if inj.get("flip_rate") is None else f"{100 * inj['flip_rate']:.1f}%"
    tested = inj.get("tested", 0)
    skipped = inj.get("skipped")
    considered = inj.get("considered", tested + (skipped or 0))
    already = inj.get("already_suspect", tested - inj.get("eligible", 0))
    where = "at a random place in each image" if inj["settings"].get("at") == "random" else \
        f"at {inj['settings'].get('at')}"
    shift = "n/a" if inj.get("mean_shift") is None else f"{inj['mean_shift']:+.3f}"
    counts = (f"{considered} image(s) of other classes, {skipped} skipped because they already carry the patch, "
              if skipped is not None else f"{considered} image(s) of other classes, ")
    return (f"Pasting the suspect patch {where} flips {inj.get('flips', 0)} of {inj.get('eligible', 0)} eligible "
            f"image(s) to {c!r} (flip rate {rate}); {counts}{tested} tested, {already} of them already called "
            f"{c!r}; mean change of p({c}) over the tested images {shift}.")


def unreadable_images(dataset: dict | None, summary: dict | None) -> list[dict]:
    """Every image the run could not use, with where and why: at intake, in the audit, in the injection test."""
    out: list[dict] = []
    for entry in (dataset or {}).get("skipped", []) or []:
        out.append({"rel": entry["rel"], "stage": "reading the folder", "reason": entry.get("reason", "")})
    s = summary or {}
    for entry in s.get("failed", []) or []:
        out.append({"rel": entry["rel"], "stage": "explaining the image", "reason": entry.get("reason", "")})
    for entry in (s.get("injection") or {}).get("failed", []) or []:
        out.append({"rel": entry["rel"], "stage": "the injection test", "reason": entry.get("reason", "")})
    return out
