"""
``GET /metrics``: Prometheus text exposition (format 0.0.4) through prometheus_client.

A custom collector turns one snapshot of the current state (the same `status_doc` the page uses) into
metric families; nothing is kept in process-global registries, so several apps in one process (tests,
the demo) never share series.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from aiohttp import web
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4
from prometheus_client.registry import Collector

from listenpost.collector.state import RUNTIME
from listenpost.collector.status import FIGURES, STATE_LABELS, Figure, status_doc


def metric_help(f: Figure) -> str:
    """The HELP line of a figure's family: its label and help text; a scaled figure names the unit it
    is exported in (the unit its metric name ends in)."""
    unit = f" Exported in {f.metric.rsplit('_', 1)[-1]}." if f.scale != 1.0 and f.metric else ""
    return f"{f.label}. {f.help}{unit}"


class SnapshotCollector(Collector):
    """Metric families from one status snapshot (``listenpost.collector.web.pages.status_doc``) and the batch counters."""

    def __init__(self, doc: dict[str, Any], counters: Any, inflight: int = 0) -> None:
        self.doc = doc
        self.counters = counters
        self.inflight = inflight

    def collect(self) -> Iterator[Metric]:
        boards = self.doc["boards"]

        # One family per figure of the shared vocabulary (collector/status.py): same name, same help.
        for f in FIGURES:
            if f.metric is None:
                continue
            cls = CounterMetricFamily if f.counter else GaugeMetricFamily
            fam = cls(f.metric, metric_help(f), labels=["board"])
            for r in boards:
                if r.get(f.key) is not None:
                    fam.add_metric([r["name"]], r[f.key] * f.scale)
            yield fam

        state = GaugeMetricFamily(
            "listenpost_board_state",
            "1 for the board's current state, 0 otherwise.",
            labels=["board", "state"],
        )
        for r in boards:
            for s in STATE_LABELS:
                state.add_metric([r["name"], s], 1.0 if r["state"] == s else 0.0)
        yield state

        by_state = GaugeMetricFamily("listenpost_boards", "Boards per state.", labels=["state"])
        for s in STATE_LABELS:
            by_state.add_metric([s], self.doc["fleet"]["by_state"].get(s, 0))
        yield by_state

        c = self.counters
        batches = CounterMetricFamily(
            "listenpost_batches", "Batch requests answered by this collector, by outcome.", labels=["status"]
        )
        for status in ("stored", "duplicate", "conflict", "rejected", "unavailable", "overloaded"):
            batches.add_metric([status], getattr(c, status))
        yield batches
        yield GaugeMetricFamily(
            "listenpost_batches_inflight", "Batch requests being read or stored now.", value=self.inflight
        )
        yield CounterMetricFamily(
            "listenpost_request_bytes",
            "Batch request bytes received as sent (compressed).",
            value=c.bytes_received,
        )
        yield GaugeMetricFamily("listenpost_tags", "Registered tags.", value=self.doc["fleet"]["tags"])


async def metrics(request: web.Request) -> web.Response:
    doc = await status_doc(request.app)
    registry = CollectorRegistry(auto_describe=False)
    runtime = request.app[RUNTIME]
    registry.register(SnapshotCollector(doc, runtime.counters, runtime.batches_inflight))
    body = generate_latest(registry)
    return web.Response(body=body, headers={"Content-Type": CONTENT_TYPE_PLAIN_0_0_4})


def add_routes(app: web.Application) -> None:
    app.router.add_get("/metrics", metrics, allow_head=False)
