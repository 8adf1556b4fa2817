"""An audit's phases, as ``run_audit`` and the web layer name them: the words shown for each and
what its progress counts (the unit of the ``step`` calls each phase makes). One table, read by the
jobs list, the audits page and the job status alike."""

from __future__ import annotations

__all__ = ["PHASES", "phase_unit", "phase_words"]

# name → (words for a person, unit of its progress or None when it reports none)
PHASES: dict[str, tuple[str, str | None]] = {
    "queued": ("waiting for a free worker", None),
    "loading the model": ("loading the model", None),
    "reading files": ("reading the folder", "files"),
    "images": ("explaining images", "images"),
    "summary": ("summarising", None),
    "pictures": ("drawing the flagged images", "flagged images"),
    "discovery": ("discovery: clustering each class's maps", "classes"),
    "confirmation": ("confirmation: testing suspicious clusters", "clusters"),
    "injection": ("injection test", "images"),
    "background swap": ("background swap", "passes"),  # two passes per image: as is and swapped
    "gallery": ("channel gallery", "steps"),  # images, then the top patches of each channel
    "feature visuals": ("synthetic pictures of channels", "optimisation steps"),
    "finished": ("finished", None),
}


def _head(phase: str) -> str:
    # discovery_phase reports "confirmation 2/3" for the second of three clusters tested
    return "confirmation" if phase.startswith("confirmation") else phase


def phase_words(phase: str) -> str:
    words = PHASES.get(_head(phase), (phase, None))[0]
    count = phase[len("confirmation"):].strip() if _head(phase) != phase else ""
    return f"{words} ({count})" if count else words


def phase_unit(phase: str | None) -> str | None:
    """What the phase's progress counts; None for an unknown phase or one without progress."""
    if not phase:
        return None
    return PHASES.get(_head(phase), (phase, None))[1]
