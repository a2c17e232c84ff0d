"""Lists: what a recommender would show, compared with what the other snapshot shows.

Needs ``group``, ``item`` and ``rank`` in both samples: each group's top-k from the candidate,
and the other snapshot's own stored sample for its lists. The trainer should score a fixed
panel of groups (say, 2,000 readers) every time, so that the baseline's stored sample carries
lists for the same groups; overlap is measured over the groups both samples carry.

Statistics (``statistic`` key), each limited in the harmful direction:

| statistic | value | breach when |
|---|---|---|
| ``coverage`` | drop of catalog coverage (other - candidate) | above ``max_change`` |
| ``gini`` | rise of the exposure Gini (candidate - other) | above ``max_change`` |
| ``popularity`` | rise of the mean popularity of shown items | above ``max_change`` |
| ``jaccard`` | mean Jaccard@k of the two lists per group | below ``min`` |
| ``rbo`` | mean rank-biased overlap per group | below ``min`` |

With ``max_relative_change`` instead of ``max_change`` the change is relative to the other
snapshot's value (0.25 = 25 %). Methods and sources: :mod:`service.stats.lists`.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from service.gate.adaptive import Transform
from service.gate.checks.base import CheckConfig, CheckContext, register, skipped
from service.gate.types import Finding, Snapshot
from service.stats import lists as list_stats

CHANGE_STATISTICS = ("coverage", "gini", "popularity")
OVERLAP_STATISTICS = ("jaccard", "rbo")
#: +1: a rise is harmful, -1: a drop is harmful.
_HARMFUL_SIGN = {"coverage": -1.0, "gini": 1.0, "popularity": 1.0}
_LABEL = {
    "coverage": "catalog coverage",
    "gini": "exposure Gini",
    "popularity": "mean popularity of shown items",
    "jaccard": "mean Jaccard@k",
    "rbo": "mean rank-biased overlap",
}


class ListsConfig(CheckConfig):
    kind: Literal["lists"]
    statistic: Literal["coverage", "gini", "popularity", "jaccard", "rbo"] = Field(
        description="coverage, gini, popularity (change vs the other snapshot), or jaccard, "
        "rbo (overlap with the other snapshot's lists)."
    )
    k: int = Field(10, ge=1, le=1000, description="Only ranks 1..k of each list count.")
    max_change: float | None = Field(
        None, ge=0, description="Largest allowed change in the harmful direction, absolute."
    )
    max_relative_change: float | None = Field(
        None, ge=0, description="Largest allowed change in the harmful direction, relative."
    )
    min: float | None = Field(
        None, ge=0, le=1, description="Lowest allowed mean overlap (jaccard, rbo)."
    )
    p: float = Field(0.9, gt=0, lt=1, description="RBO persistence (0.9: top 10 ranks weigh 86%).")
    min_groups: int = Field(
        20, ge=1, description="Fewer groups than this (in common, for overlap): inconclusive."
    )
    catalog_size: int | None = Field(
        None, ge=1, description="Catalog size for coverage and Gini, if not reported."
    )
    catalog_size_metric: str = Field(
        "catalog_size",
        min_length=1,
        description="Reported metric holding the catalog size; it wins over catalog_size.",
    )
    popularity: Literal["sample", "supplied"] = Field(
        "sample",
        description="sample: share of the other snapshot's lists showing the item; supplied: "
        "reported metrics named popularity_prefix + item.",
    )
    popularity_prefix: str = Field(
        "popularity.", min_length=1, description="Metric name prefix of supplied popularity."
    )

    def consistency(self) -> None:
        super().consistency()
        if self.statistic in OVERLAP_STATISTICS:
            if self.min is None:
                raise ValueError(f"statistic {self.statistic!r} needs 'min'")
            if self.max_change is not None or self.max_relative_change is not None:
                raise ValueError(f"statistic {self.statistic!r} takes 'min', not max_change")
        else:
            if (self.max_change is None) == (self.max_relative_change is None):
                raise ValueError(
                    f"statistic {self.statistic!r} needs exactly one of max_change, "
                    "max_relative_change"
                )
            if self.min is not None:
                raise ValueError(f"'min' goes with jaccard or rbo, not {self.statistic!r}")

    def bad_side(self) -> Literal["upper", "lower"]:
        return "lower" if self.statistic in OVERLAP_STATISTICS else "upper"

    def natural_transform(self) -> Transform:
        """Overlaps near 1 on log(1 - x); changes (either sign) as they are."""
        return "log1m" if self.statistic in OVERLAP_STATISTICS else "none"


def _lists_of(snapshot: Snapshot, k: int) -> dict[str, tuple[str, ...]] | None:
    sample = snapshot.sample
    if sample is None:
        return None
    group, item, rank = sample.column("group"), sample.column("item"), sample.column("rank")
    if group is None or item is None or rank is None:
        return None
    return list_stats.ranked_lists(group, item, rank, k=k)


def _catalog_size(config: ListsConfig, ctx: CheckContext, observed: int) -> tuple[int, str]:
    reported = ctx.candidate.metrics.get(config.catalog_size_metric)
    if reported is not None and reported >= 1:
        size, source = int(reported), f"reported metric {config.catalog_size_metric!r}"
    elif config.catalog_size is not None:
        size, source = config.catalog_size, "policy catalog_size"
    else:
        return observed, "observed (distinct items in both snapshots' lists)"
    if size < observed:
        return observed, f"observed ({source} {size} is below the {observed} items seen)"
    return size, source


def _popularity(
    config: ListsConfig, ctx: CheckContext, other_lists: dict[str, tuple[str, ...]]
) -> tuple[dict[str, float] | None, str]:
    if config.popularity == "supplied":
        prefix = config.popularity_prefix
        supplied = {
            name[len(prefix) :]: float(value)
            for name, value in ctx.candidate.metrics.items()
            if name.startswith(prefix)
        }
        if supplied:
            return supplied, f"supplied ({len(supplied)} items)"
        return None, f"the candidate reports no metric named {prefix!r} + item"
    return (
        list_stats.list_share_popularity(other_lists),
        f"share of the {config.against}'s lists showing the item",
    )


@register("lists", ListsConfig, family="lists")
def run_lists(config: ListsConfig, ctx: CheckContext) -> list[Finding]:
    other = ctx.other
    assert other is not None  # needs_other: evaluate skips when absent
    statistic = config.statistic
    cand_lists = _lists_of(ctx.candidate, config.k)
    other_lists = _lists_of(other, config.k)
    if cand_lists is None or other_lists is None:
        side = "candidate" if cand_lists is None else config.against
        return [
            skipped(
                config,
                f"the {side} sample carries no group/item/rank columns: no lists to compare",
                statistic=statistic,
            )
        ]
    if not cand_lists or not other_lists:
        side = "candidate" if not cand_lists else config.against
        return [skipped(config, f"the {side} sample has no list rows within rank {config.k}")]

    def finding(outcome: str, message: str, **fields: object) -> Finding:
        return Finding(
            check=config.name,
            kind=config.kind,
            outcome=outcome,  # type: ignore[arg-type]
            statistic=statistic,
            message=message,
            blocking=config.blocking,
            against=config.against,
            **fields,  # type: ignore[arg-type]
        )

    if statistic in OVERLAP_STATISTICS:
        summary = list_stats.overlap(cand_lists, other_lists, measure=statistic, p=config.p)
        if summary is None:
            return [
                skipped(
                    config,
                    f"no group is in both the candidate's and the {config.against}'s lists "
                    "(score the same panel of groups each time)",
                    statistic=statistic,
                )
            ]
        overlap_details = {
            "groups_in_common": summary.groups,
            "groups_candidate": len(cand_lists),
            f"groups_{config.against}": len(other_lists),
            "quantiles_10_50_90": list(summary.quantiles),
            "k": config.k,
            **({"p": config.p} if statistic == "rbo" else {}),
        }
        assert config.min is not None
        text = (
            f"{_LABEL[statistic]} with the {config.against}'s lists {summary.mean:.3f} over "
            f"{summary.groups} groups"
        )
        if summary.groups < config.min_groups:
            return [
                finding(
                    "inconclusive",
                    f"{text}: fewer than the {config.min_groups} groups needed",
                    value=summary.mean,
                    limit=config.min,
                    details=overlap_details,
                )
            ]
        low = summary.mean < config.min
        return [
            finding(
                "breach" if low else "ok",
                f"{text} is below {config.min:g}" if low else f"{text} (at least {config.min:g})",
                value=summary.mean,
                limit=config.min,
                details=overlap_details,
            )
        ]

    if len(cand_lists) < config.min_groups or len(other_lists) < config.min_groups:
        return [
            finding(
                "inconclusive",
                f"too few lists to measure {_LABEL[statistic]} ({len(cand_lists)} candidate, "
                f"{len(other_lists)} {config.against}; {config.min_groups} needed)",
            )
        ]
    observed = len(set(list_stats.exposure(cand_lists)) | set(list_stats.exposure(other_lists)))
    details: dict[str, object] = {"k": config.k}
    if statistic == "popularity":
        popularity, source = _popularity(config, ctx, other_lists)
        if popularity is None:
            return [finding("breach", f"popularity = 'supplied' but {source}")]
        cand_value = list_stats.mean_popularity(cand_lists, popularity)
        other_value = list_stats.mean_popularity(other_lists, popularity)
        details["popularity_source"] = source
    else:
        size, source = _catalog_size(config, ctx, observed)
        cand_summary = list_stats.summarise_lists(cand_lists, catalog_size=size)
        other_summary = list_stats.summarise_lists(other_lists, catalog_size=size)
        cand_value = getattr(cand_summary, statistic)
        other_value = getattr(other_summary, statistic)
        details.update(
            {
                "catalog_size": size,
                "catalog_size_source": source,
                "distinct_items_candidate": cand_summary.distinct_items,
                f"distinct_items_{config.against}": other_summary.distinct_items,
            }
        )
    sign = _HARMFUL_SIGN[statistic]
    harmful = sign * (cand_value - other_value)
    relative = config.max_relative_change is not None
    if relative:
        if other_value == 0:
            return [
                finding(
                    "skipped",
                    f"the {config.against}'s {_LABEL[statistic]} is 0: no relative change",
                    baseline_value=other_value,
                    candidate_value=cand_value,
                    details=details,
                )
            ]
        value = harmful / abs(other_value)
        limit = config.max_relative_change
        shown = f"{value:+.1%}"
    else:
        value = harmful
        limit = config.max_change
        shown = f"{value:+.3g}"
    assert limit is not None
    word = "drop" if sign < 0 else "rise"
    text = (
        f"{_LABEL[statistic]} {cand_value:.3g} vs {config.against} {other_value:.3g}: "
        f"{word} {shown}"
    )
    over = value > limit
    limit_text = f"{limit:.1%}" if relative else f"{limit:g}"
    # what value and limit measure, for pages: "relative drop" (a share) or "rise" (absolute)
    details["change"] = f"relative {word}" if relative else word
    return [
        finding(
            "breach" if over else "ok",
            f"{text} exceeds {limit_text}" if over else f"{text} (at most {limit_text})",
            value=value,
            limit=limit,
            baseline_value=other_value,
            candidate_value=cand_value,
            details=details,
        )
    ]
