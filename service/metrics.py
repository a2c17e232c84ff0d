"""Counters and histograms in the Prometheus text exposition format (version 0.0.4), written
here rather than taken from a client library: three metric kinds and one renderer are all we use.

Metrics are per process: with several workers or instances, Prometheus scrapes each one and
sums. ``render(allow=...)`` leaves out series whose ``model`` label the caller may not see.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

#: Seconds; evaluation of a post takes milliseconds to a few seconds (large samples).
LATENCY_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0)

LabelValues = tuple[str, ...]


def escape_label(value: str) -> str:
    """Label value escaping of the text format: backslash, double quote and line feed."""
    return value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n")


def format_value(value: float) -> str:
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    if value == int(value) and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


def _labels(names: Sequence[str], values: Sequence[str], extra: str = "") -> str:
    parts = [f'{n}="{escape_label(v)}"' for n, v in zip(names, values, strict=True)]
    if extra:
        parts.append(extra)
    return "{" + ",".join(parts) + "}" if parts else ""


@dataclass
class Counter:
    name: str
    help: str
    labels: tuple[str, ...] = ()
    values: dict[LabelValues, float] = field(default_factory=dict)

    def inc(self, *label_values: str, amount: float = 1.0) -> None:
        key = tuple(label_values)
        self.values[key] = self.values.get(key, 0.0) + amount

    def lines(self, keep: Callable[[dict[str, str]], bool]) -> list[str]:
        out = [f"# HELP {self.name} {self.help}", f"# TYPE {self.name} counter"]
        for key, value in sorted(self.values.items()):
            if keep(dict(zip(self.labels, key, strict=True))):
                out.append(f"{self.name}{_labels(self.labels, key)} {format_value(value)}")
        return out


@dataclass
class Histogram:
    name: str
    help: str
    labels: tuple[str, ...] = ()
    buckets: tuple[float, ...] = LATENCY_BUCKETS
    counts: dict[LabelValues, list[int]] = field(default_factory=dict)
    sums: dict[LabelValues, float] = field(default_factory=dict)

    def observe(self, value: float, *label_values: str) -> None:
        key = tuple(label_values)
        counts = self.counts.setdefault(key, [0] * (len(self.buckets) + 1))
        for i, bound in enumerate(self.buckets):
            if value <= bound:
                counts[i] += 1
        counts[-1] += 1  # +Inf
        self.sums[key] = self.sums.get(key, 0.0) + value

    def lines(self, keep: Callable[[dict[str, str]], bool]) -> list[str]:
        out = [f"# HELP {self.name} {self.help}", f"# TYPE {self.name} histogram"]
        for key, counts in sorted(self.counts.items()):
            if not keep(dict(zip(self.labels, key, strict=True))):
                continue
            bounds = [format_value(b) for b in self.buckets] + ["+Inf"]
            for bound, count in zip(bounds, counts, strict=True):
                le = 'le="' + bound + '"'
                out.append(f"{self.name}_bucket{_labels(self.labels, key, le)} {count}")
            out.append(f"{self.name}_sum{_labels(self.labels, key)} {format_value(self.sums[key])}")
            out.append(f"{self.name}_count{_labels(self.labels, key)} {counts[-1]}")
        return out


class Metrics:
    """The service's metrics. Thread-safe (routes run in a thread pool)."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.verdicts = Counter(
            "tidegate_verdicts_total",
            "Verdicts stored, by model and decision.",
            ("model", "decision"),
        )
        self.evaluation = Histogram(
            "tidegate_evaluation_seconds",
            "Time to judge a post (loading comparison data and evaluating), by model.",
            ("model",),
        )
        self.requests = Counter(
            "tidegate_http_requests_total",
            "HTTP requests answered, by method, route and status.",
            ("method", "route", "status"),
        )
        self.errors = Counter(
            "tidegate_http_request_errors_total",
            "HTTP requests answered with an error (status 400 or more), by route and error code.",
            ("route", "code"),
        )
        self.latency = Histogram(
            "tidegate_http_request_duration_seconds",
            "Time to answer an HTTP request, by route.",
            ("route",),
        )

    def verdict(self, *, model: str, decision: str, seconds: float) -> None:
        with self._lock:
            self.verdicts.inc(model, decision)
            self.evaluation.observe(seconds, model)

    def request(
        self, *, method: str, route: str, status: int, code: str | None, seconds: float
    ) -> None:
        with self._lock:
            self.requests.inc(method, route, str(status))
            self.latency.observe(seconds, route)
            if status >= 400:
                self.errors.inc(route, code or "http_error")

    def render(self, allow: Callable[[str], bool] = lambda _model: True) -> str:
        """The text format; series with a ``model`` label are kept when ``allow(model)``."""

        def keep(labels: dict[str, str]) -> bool:
            return "model" not in labels or allow(labels["model"])

        with self._lock:
            lines: list[str] = []
            for metric in (
                self.verdicts,
                self.evaluation,
                self.requests,
                self.errors,
                self.latency,
            ):
                lines.extend(metric.lines(keep))
        return "\n".join(lines) + "\n"
