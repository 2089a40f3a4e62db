"""The service's metrics through `prometheus_client`, in the Prometheus text exposition
format (version 0.0.4).

A `Metrics` object lives on the app (no module globals of ours). Under `kilter serve`, the
command gives its worker processes one fresh private folder in PROMETHEUS_MULTIPROC_DIR
(service/commands.py) before any of them imports prometheus_client; each worker then
writes its figures to files there and `/metrics` on any worker answers the sum over every
worker of that `serve` process, including workers that have since exited (counters never
jump back when uvicorn replaces one). Each replica (each `serve` process) answers for
itself: scrape every replica (compose: service-a and service-b on port 8000) and sum in
Prometheus; the proxy's port would give one replica at random. Without
PROMETHEUS_MULTIPROC_DIR (tests, embedding) the figures are this process's own.

The names are kilter_*; counters end in _total.
"""

from __future__ import annotations

import os
from collections.abc import Sequence

import prometheus_client
from prometheus_client import CollectorRegistry, generate_latest, multiprocess

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
LATENCY_BUCKETS_S = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)
MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"

# The *_created series say when a process first counted: noise for a service whose counters
# are summed over workers (and absent in multiprocess mode anyway).
prometheus_client.disable_created_metrics()


def multiprocess_dir() -> str | None:
    return os.environ.get(MULTIPROC_ENV) or None


class Counter:
    """A counter with optional labels, incremented as `inc(amount, **labels)`."""

    def __init__(self, name: str, help_text: str, registry: CollectorRegistry | None, labels: Sequence[str] = ()) -> None:
        self.labels = tuple(labels)
        self._metric = prometheus_client.Counter(name, help_text, labelnames=self.labels, registry=registry)

    def inc(self, amount: float = 1.0, **labels: str) -> None:
        if amount == 0:
            return
        target = self._metric.labels(**labels) if self.labels else self._metric
        target.inc(amount)


class Histogram:
    def __init__(self, name: str, help_text: str, registry: CollectorRegistry | None, buckets: Sequence[float] = LATENCY_BUCKETS_S) -> None:
        self._metric = prometheus_client.Histogram(name, help_text, buckets=tuple(buckets), registry=registry)

    def observe(self, value: float) -> None:
        self._metric.observe(value)


class Metrics:
    """The service's figures."""

    def __init__(self) -> None:
        self.shared_dir = multiprocess_dir()
        # Multiprocess mode: values live in the folder's files and the registry is built per
        # scrape from them; otherwise an own registry per app (tests build many apps).
        reg = None if self.shared_dir else CollectorRegistry(auto_describe=True)
        self._registry = reg
        self.requests = Counter("kilter_http_requests_total", "HTTP requests by method, route template and status.", reg,
                                ("method", "route", "status"))
        self.request_seconds = Histogram("kilter_http_request_seconds", "HTTP request latency in seconds.", reg)
        self.scoring_seconds = Histogram("kilter_scoring_seconds", "ONNX Runtime scoring time per request batch in seconds.", reg)
        self.windows_scored = Counter("kilter_windows_scored_total", "Windows scored and stored.", reg)
        self.windows_skipped = Counter("kilter_windows_skipped_total", "Windows not scored because they span a long gap.", reg)
        self.readings_accepted = Counter("kilter_readings_accepted_total", "Readings stored.", reg)
        self.readings_duplicate = Counter("kilter_readings_duplicate_total", "Readings already stored with the same values.", reg)
        self.alerts_opened = Counter("kilter_alerts_opened_total", "Alerts opened, by severity.", reg, ("severity",))
        self.ingest_replans = Counter(
            "kilter_ingest_replans_total", "Ingest plans made again under the write lock (another writer changed the asset meanwhile).", reg
        )
        self.pruned_rows = Counter("kilter_retention_pruned_rows_total", "Rows removed by retention, by table.", reg, ("table",))

    def render(self) -> str:
        if self.shared_dir:
            registry = CollectorRegistry()
            multiprocess.MultiProcessCollector(registry, path=self.shared_dir)
        else:
            assert self._registry is not None
            registry = self._registry
        return generate_latest(registry).decode("utf-8")
