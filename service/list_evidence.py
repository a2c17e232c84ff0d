"""Evidence for a list hold: which items took the slots, and how exposure spread.

Pure functions over two stored samples' ``group``, ``item`` and ``rank`` columns (each group's
top-k, as the list checks read them, :func:`service.stats.lists.ranked_lists`). A *slot* is one
place in one list; an item's *share* is the part of all slots it holds. The result names the
items that gained and lost the most slots (share before and after), catalog coverage and the
exposure Gini on both sides, and each side's Lorenz curve of exposure: items sorted from least
to most shown, the cumulative share of items against the cumulative share of slots (the curve
whose area gives the Gini coefficient, see :func:`service.stats.lists.gini`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from service.gate.types import Sample, json_safe
from service.stats import lists as list_stats

#: Items listed among the largest gains and among the largest losses.
TOP_ITEMS = 8
#: Points kept of each Lorenz curve (enough for a smooth line at any width).
LORENZ_POINTS = 101


def k_of(findings: Sequence[Mapping[str, Any]]) -> int:
    """The list cut-off the list checks used (their ``details.k``), 10 when none says."""
    for f in findings:
        details = f.get("details") or {}
        k = details.get("k") if isinstance(details, Mapping) else None
        if isinstance(k, int) and k >= 1:
            return k
    return 10


def catalog_of(metrics: Mapping[str, float], name: str = "catalog_size") -> int | None:
    """The catalog size the trainer reported, if any."""
    value = metrics.get(name)
    return int(value) if value is not None and value >= 1 else None


def lorenz(counts: Sequence[float], size: int, points: int = LORENZ_POINTS) -> list[list[float]]:
    """The Lorenz curve of *counts* over a catalog of *size* items (unshown items as zeros):
    ``[x, y]`` pairs from ``[0, 0]`` to ``[1, 1]``, x the share of items (least shown first),
    y the share of slots they hold, at most *points* pairs evenly spaced in x."""
    values = np.sort(np.concatenate([np.asarray(counts, float), np.zeros(size - len(counts))]))
    total = float(values.sum())
    if total <= 0 or values.size == 0:
        return []
    cum = np.concatenate([[0.0], np.cumsum(values) / total])
    share = np.linspace(0.0, 1.0, values.size + 1)
    grid = np.linspace(0.0, 1.0, min(points, values.size + 1))
    return [
        [round(float(x), 5), round(float(y), 5)]
        for x, y in zip(grid, np.interp(grid, share, cum), strict=True)
    ]


def list_evidence(
    candidate: Sample,
    other: Sample | None,
    *,
    against: str,
    other_key: str | None,
    k: int = 10,
    catalog_size: int | None = None,
) -> dict[str, Any] | None:
    """List evidence of *candidate* against *other* (the baseline's or reference's sample),
    or None when either side carries no lists."""
    if other is None:
        return None
    sides = {}
    for name, sample in (("candidate", candidate), ("other", other)):
        group, item, rank = (sample.column(c) for c in ("group", "item", "rank"))
        if group is None or item is None or rank is None:
            return None
        lists = list_stats.ranked_lists(group, item, rank, k=k)
        if not lists:
            return None
        sides[name] = lists
    exposure = {name: list_stats.exposure(lists) for name, lists in sides.items()}
    slots = {name: sum(counts.values()) for name, counts in exposure.items()}
    observed = len(set(exposure["candidate"]) | set(exposure["other"]))
    size = max(catalog_size or 0, observed)
    summary = {
        name: list_stats.summarise_lists(lists, catalog_size=size) for name, lists in sides.items()
    }
    rows: list[dict[str, Any]] = []
    for it in set(exposure["candidate"]) | set(exposure["other"]):
        before = exposure["other"].get(it, 0) / slots["other"]
        after = exposure["candidate"].get(it, 0) / slots["candidate"]
        rows.append(
            {
                "item": it,
                "share_before": before,
                "share_after": after,
                "change": after - before,
                "slots_before": exposure["other"].get(it, 0),
                "slots_after": exposure["candidate"].get(it, 0),
            }
        )
    gained = sorted((r for r in rows if r["change"] > 0), key=lambda r: (-r["change"], r["item"]))
    lost = sorted((r for r in rows if r["change"] < 0), key=lambda r: (r["change"], r["item"]))
    top = sorted(rows, key=lambda r: -r["share_after"])[:10]
    out = {
        "against": against,
        "other_key": other_key,
        "k": k,
        "catalog_size": size,
        "catalog_size_source": "reported"
        if catalog_size and catalog_size >= observed
        else "observed",
        "groups": {"candidate": len(sides["candidate"]), "other": len(sides["other"])},
        "slots": slots,
        "coverage": {
            "candidate": summary["candidate"].coverage,
            "other": summary["other"].coverage,
        },
        "gini": {"candidate": summary["candidate"].gini, "other": summary["other"].gini},
        "distinct_items": {
            "candidate": summary["candidate"].distinct_items,
            "other": summary["other"].distinct_items,
        },
        "top10_share": {
            "candidate": sum(r["share_after"] for r in top),
            "other": sum(
                r["share_before"] for r in sorted(rows, key=lambda r: -r["share_before"])[:10]
            ),
        },
        "gained": gained[:TOP_ITEMS],
        "lost": lost[:TOP_ITEMS],
        "lorenz": {
            "candidate": lorenz(list(exposure["candidate"].values()), size),
            "other": lorenz(list(exposure["other"].values()), size),
        },
    }
    result: dict[str, Any] = json_safe(out)
    return result
