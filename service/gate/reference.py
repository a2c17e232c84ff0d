"""Which snapshot is a model's reference: the longer-term anchor that catches slow creep. Pure.

Many small steps that each pass the baseline check can add up to a large change. Checks with
``against = "reference"`` compare the candidate with a reference snapshot instead:

1. a reference **pinned** by an operator (``PUT /v1/models/{model}/reference``) always wins;
2. otherwise, when the policy sets ``[reference] lag_hours = N``, the reference is the
   snapshot that was the **baseline N hours of training earlier**: among the snapshots that
   became the baseline (and were not replaced by a rollback), the one with the newest
   watermark (``trained_until``) at or before the candidate's watermark minus N hours. Time is
   the trainer's watermark, not the service's clock, so a backfill or a replay (posts seconds
   apart, each a quarter of an hour of training further) gets the same reference as live
   traffic. Only a candidate without a watermark falls back to the clock: the baseline as of
   ``now - N h``;
3. otherwise there is no reference, and reference checks are ``skipped``.

A lagged reference catches any creep faster than its limit per N hours of training; a pinned
one catches every creep since the pin, but must be moved by hand after an intended change.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Literal


@dataclass(frozen=True)
class Promotion:
    """A snapshot became the baseline at ``at`` (by verdict, override or rollback).

    ``trained_until`` is that snapshot's watermark; ``rolled_back`` says a rollback later
    replaced it (it no longer counts as an anchor).
    """

    snapshot_key: str
    at: datetime
    trained_until: datetime | None = None
    rolled_back: bool = False


@dataclass(frozen=True)
class ReferenceChoice:
    """The chosen reference key (None: no reference) and how it was chosen."""

    snapshot_key: str | None
    source: Literal["pinned", "lag", "none"]
    message: str


def baseline_as_of(promotions: Sequence[Promotion], at: datetime) -> str | None:
    """The key of the snapshot that was the baseline at time *at*, None if none was yet."""
    best: Promotion | None = None
    for promotion in promotions:
        if promotion.at <= at and (best is None or promotion.at >= best.at):
            best = promotion
    return None if best is None else best.snapshot_key


def baseline_as_of_watermark(promotions: Sequence[Promotion], until: datetime) -> str | None:
    """The key of the promoted, not rolled-back snapshot with the newest watermark at or before
    *until* (ties: the later promotion), None if there is none."""
    best: Promotion | None = None
    for promotion in promotions:
        mark = promotion.trained_until
        if mark is None or promotion.rolled_back or mark > until:
            continue
        if best is None or best.trained_until is None or mark >= best.trained_until:
            best = promotion
    return None if best is None else best.snapshot_key


def choose_reference(
    *,
    pinned: str | None,
    lag_hours: float | None,
    promotions: Sequence[Promotion],
    now: datetime,
    watermark: datetime | None = None,
) -> ReferenceChoice:
    """Apply the rules of the module docstring; *watermark* is the candidate's."""
    if pinned is not None:
        return ReferenceChoice(pinned, "pinned", f"reference {pinned!r} pinned by an operator")
    if lag_hours is None:
        return ReferenceChoice(None, "none", "no reference pinned and no lag_hours in the policy")
    if watermark is not None:
        until = watermark - timedelta(hours=lag_hours)
        key = baseline_as_of_watermark(promotions, until)
        if key is None:
            return ReferenceChoice(
                None,
                "none",
                f"no baseline was trained until {until.isoformat()} or earlier "
                f"({lag_hours:g} h before the candidate's watermark)",
            )
        return ReferenceChoice(
            key,
            "lag",
            f"reference {key!r}: the newest baseline trained until {until.isoformat()} or "
            f"earlier ({lag_hours:g} h before the candidate's watermark)",
        )
    at = now - timedelta(hours=lag_hours)
    key = baseline_as_of(promotions, at)
    if key is None:
        return ReferenceChoice(
            None, "none", f"the model had no baseline {lag_hours:g} h ago ({at.isoformat()})"
        )
    return ReferenceChoice(
        key, "lag", f"reference {key!r}: the baseline as of {lag_hours:g} h ago ({at.isoformat()})"
    )
