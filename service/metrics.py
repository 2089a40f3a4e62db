"""Process-local metrics rendered in the Prometheus text exposition format (version 0.0.4).

A `Metrics` object lives on the app (no module globals). With `serve --workers N` each
worker process keeps its own figures; scrape each worker or run one worker per replica.
"""

from __future__ import annotations

import bisect
import math
import threading
from collections.abc import Sequence

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
LATENCY_BUCKETS_S = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)

Labels = tuple[tuple[str, str], ...]


def _escape(value: str) -> str:
    return value.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _fmt_labels(labels: Labels, extra: Labels = ()) -> str:
    items = labels + extra
    if not items:
        return ""
    return "{" + ",".join(f'{k}="{_escape(v)}"' for k, v in items) + "}"


def _fmt_value(v: float) -> str:
    if math.isinf(v):
        return "+Inf" if v > 0 else "-Inf"
    return repr(float(v)) if not float(v).is_integer() else str(int(v))


class Counter:
    def __init__(self, name: str, help_text: str) -> None:
        self.name, self.help = name, help_text
        self._values: dict[Labels, float] = {}
        self._lock = threading.Lock()

    def inc(self, amount: float = 1.0, **labels: str) -> None:
        key = tuple(sorted(labels.items()))
        with self._lock:
            self._values[key] = self._values.get(key, 0.0) + amount

    def value(self, **labels: str) -> float:
        return self._values.get(tuple(sorted(labels.items())), 0.0)

    def render(self) -> list[str]:
        lines = [f"# HELP {self.name} {self.help}", f"# TYPE {self.name} counter"]
        with self._lock:
            items = sorted(self._values.items())
        if not items:
            items = [((), 0.0)]
        lines += [f"{self.name}{_fmt_labels(k)} {_fmt_value(v)}" for k, v in items]
        return lines


class Histogram:
    def __init__(self, name: str, help_text: str, buckets: Sequence[float] = LATENCY_BUCKETS_S) -> None:
        self.name, self.help = name, help_text
        self.buckets = tuple(sorted(buckets))
        self._counts = [0] * (len(self.buckets) + 1)  # last = +Inf
        self._sum = 0.0
        self._lock = threading.Lock()

    def observe(self, value: float) -> None:
        i = bisect.bisect_left(self.buckets, value)
        with self._lock:
            self._counts[i] += 1
            self._sum += value

    @property
    def count(self) -> int:
        return sum(self._counts)

    def render(self) -> list[str]:
        lines = [f"# HELP {self.name} {self.help}", f"# TYPE {self.name} histogram"]
        with self._lock:
            counts, total = list(self._counts), self._sum
        running = 0
        for le, c in zip((*self.buckets, math.inf), counts):
            running += c
            le_text = "+Inf" if math.isinf(le) else repr(le)
            lines.append(f"{self.name}_bucket{_fmt_labels((), (('le', le_text),))} {running}")
        lines.append(f"{self.name}_sum {_fmt_value(total)}")
        lines.append(f"{self.name}_count {running}")
        return lines


class Metrics:
    """The service's figures."""

    def __init__(self) -> None:
        self.requests = Counter("kilter_http_requests_total", "HTTP requests by method, route template and status.")
        self.request_seconds = Histogram("kilter_http_request_seconds", "HTTP request latency in seconds.")
        self.scoring_seconds = Histogram("kilter_scoring_seconds", "ONNX Runtime scoring time per request batch in seconds.")
        self.windows_scored = Counter("kilter_windows_scored_total", "Windows scored and stored.")
        self.windows_skipped = Counter("kilter_windows_skipped_total", "Windows not scored because they span a long gap.")
        self.readings_accepted = Counter("kilter_readings_accepted_total", "Readings stored.")
        self.readings_duplicate = Counter("kilter_readings_duplicate_total", "Readings already stored with the same values.")
        self.alerts_opened = Counter("kilter_alerts_opened_total", "Alerts opened, by severity.")
        self.ingest_replans = Counter(
            "kilter_ingest_replans_total", "Ingest plans made again under the write lock (another writer changed the asset meanwhile)."
        )
        self.pruned_rows = Counter("kilter_retention_pruned_rows_total", "Rows removed by retention, by table.")

    def render(self) -> str:
        parts: list[str] = []
        for m in (
            self.requests,
            self.request_seconds,
            self.scoring_seconds,
            self.windows_scored,
            self.windows_skipped,
            self.readings_accepted,
            self.readings_duplicate,
            self.alerts_opened,
            self.ingest_replans,
            self.pruned_rows,
        ):
            parts.extend(m.render())
        return "\n".join(parts) + "\n"
