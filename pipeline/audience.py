"""Who a set of outputs is for, and the small-cell threshold that follows from it.

Anything that may leave the hospital is written for ``publication``: no count from 1 to
``small_cell_threshold - 1`` is shown or derivable. A site may also set
``[privacy] internal_small_cell_threshold`` (lower) for its own quality meetings, so a small
ward's figures are not all hidden; those outputs go to their own folder and say on every page
and in every file's metadata that they are internal.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from pipeline.config import SiteConfig


@dataclass(frozen=True)
class Audience:
    name: str  # "publication" or "internal"
    threshold: int  # smallest count shown
    folder: Path
    label: str  # stated on every page and in every file's metadata


def publication(config: SiteConfig) -> Audience:
    k = config.small_cell_threshold
    return Audience(
        name="publication",
        threshold=k,
        folder=config.output_folder,
        label=f"For publication: no count from 1 to {k - 1} is shown or can be derived.",
    )


def internal(config: SiteConfig) -> Audience | None:
    k = config.internal_small_cell_threshold
    if k is None:
        return None
    return Audience(
        name="internal",
        threshold=k,
        folder=config.output_folder / "internal",
        label=(
            f"INTERNAL - for {config.site_name}'s own quality meetings only; not for release outside the "
            f"hospital. Counts from {k} up are shown (publication threshold {config.small_cell_threshold})."
            if k > 1
            else f"INTERNAL - for {config.site_name}'s own quality meetings only; not for release outside the "
            f"hospital. No count is hidden (publication threshold {config.small_cell_threshold})."
        ),
    )


def audiences(config: SiteConfig) -> list[Audience]:
    """Internal first (when set), publication last, so the store keeps the publication tables."""
    chosen = internal(config)
    return ([chosen] if chosen else []) + [publication(config)]
