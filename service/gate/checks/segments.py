"""Segments: run a check on the whole sample and on each value of ``segment.<name>`` columns.

A check that lists ``segments = ["device", "reader_tenure"]`` is run once on all rows (the unit
``"(all)"``) and once per value of each listed column (``"device=app"``, ``"device=web"``, ...),
each column on its own (no cross product). Values with fewer than ``min_segment_rows`` rows are
reported as too small and left out. The p-values of the units that ran form one family and are
adjusted together (Holm by default, Benjamini–Hochberg on request), so adding segments does not
raise the rate of false holds [1], [2]: for ``drift`` the p-values of a shift, for ``quality``
those of "worse than the boundary".

References
----------
1. Holm, S. (1979). Scandinavian Journal of Statistics 6(2), 65–70.
2. Benjamini, Y. & Hochberg, Y. (1995). Journal of the Royal Statistical Society B 57(1), 289–300.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from pydantic import Field

from service.gate.checks.base import CheckConfig
from service.gate.checks.memo import codes_of
from service.gate.types import SEGMENT_PREFIX, Sample

ALL = "(all)"


class SegmentKeys(CheckConfig):
    """Keys shared by checks that can run per segment."""

    segments: list[str] = Field(
        default_factory=list,
        description="Segment column names (without 'segment.') to also run the check per value "
        "of; '*' stands for every segment column the sample carries.",
    )
    min_segment_rows: int = Field(
        1000, ge=1, description="Segment values with fewer rows are reported but not tested."
    )


class CorrectedSegmentKeys(SegmentKeys):
    """Segment keys for checks with p-values: how the family of p-values is adjusted."""

    correction: Literal["holm", "bh"] = Field(
        "holm", description="Multiple-testing adjustment over segments: holm or bh."
    )


def where(labels: list[str]) -> str:
    """`` in device=web, all rows`` for a message; empty when only all rows are meant."""
    if not labels or labels == [ALL]:
        return ""
    return " in " + ", ".join("all rows" if label == ALL else label for label in labels)


@dataclass(frozen=True)
class Unit:
    """One row selection a check runs on: all rows, or one segment value."""

    label: str
    column: str | None
    value: str | None
    #: Index of ``value`` among the column's sorted distinct values.
    index: int | None
    #: Row indices into the sample (None: every row).
    rows: np.ndarray | None


def segment_column(sample: Sample, name: str) -> np.ndarray | None:
    return sample.column(SEGMENT_PREFIX + name)


@dataclass(frozen=True)
class Split:
    """The units to run, and the segment values that were too small or absent."""

    units: list[Unit]
    too_small: list[dict[str, object]]
    missing_columns: list[str]


ANY = "*"


def expand(names: list[str], sample: Sample) -> list[str]:
    """*names* with ``"*"`` replaced by every segment column of *sample* (sorted, no repeats)."""
    if ANY not in names:
        return names
    out: list[str] = []
    for name in names:
        for item in sample.segment_names() if name == ANY else [name]:
            if item not in out:
                out.append(item)
    return out


def split(
    sample: Sample, names: list[str], min_rows: int, *, keep: np.ndarray | None = None
) -> Split:
    """Units for *sample*: ``(all)`` first, then each value of each named segment column.

    *keep* (row indices) restricts every unit to those rows (e.g. rows with finite inputs);
    unit ``rows`` are then indices into the kept rows.
    """
    names = expand(names, sample)
    units = [Unit(ALL, None, None, None, None)]
    too_small: list[dict[str, object]] = []
    missing: list[str] = []
    for name in names:
        column = segment_column(sample, name)
        if column is None:
            missing.append(name)
            continue
        codes = codes_of(column, SEGMENT_PREFIX + name)
        row_codes = codes.codes if keep is None else codes.codes[keep]
        counts = np.bincount(row_codes, minlength=codes.n_values)
        for index, value in enumerate(codes.values):
            label = f"{name}={value}"
            if counts[index] < min_rows:
                too_small.append({"segment": label, "rows": int(counts[index])})
                continue
            units.append(Unit(label, name, value, index, np.flatnonzero(row_codes == index)))
    return Split(units=units, too_small=too_small, missing_columns=missing)


def matching_rows(
    sample: Sample, unit: Unit, *, keep: np.ndarray | None = None
) -> np.ndarray | None:
    """Rows of another sample (the baseline's own) in the same segment as *unit*.

    None means every row (unit ``(all)``); raises ValueError when the column is absent.
    """
    if unit.column is None:
        return None
    column = segment_column(sample, unit.column)
    if column is None:
        raise ValueError(f"the other sample has no column 'segment.{unit.column}'")
    codes = codes_of(column, SEGMENT_PREFIX + unit.column)
    row_codes = codes.codes if keep is None else codes.codes[keep]
    if unit.value not in codes.values:
        return np.empty(0, dtype=np.int64)
    return np.flatnonzero(row_codes == codes.values.index(unit.value))


def kept_codes(sample: Sample, name: str, keep: np.ndarray | None) -> tuple[np.ndarray, int]:
    """Codes of ``segment.<name>`` restricted to *keep*, and the number of distinct values."""
    column = segment_column(sample, name)
    if column is None:
        raise ValueError(f"the sample has no column 'segment.{name}'")
    codes = codes_of(column, SEGMENT_PREFIX + name)
    return (codes.codes if keep is None else codes.codes[keep]), codes.n_values
