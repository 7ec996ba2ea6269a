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
from listenpost.collector.status import STATE_LABELS, status_doc


class SnapshotCollector(Collector):
    """Metric families from one status snapshot (``listenpost.collector.web.pages.status_doc``) and the batch counters."""

    def __init__(self, doc: dict[str, Any], counters: Any, inflight: int = 0) -> None:
        self.doc = doc
        self.counters = counters
        self.inflight = inflight

    def collect(self) -> Iterator[Metric]:
        boards = self.doc["boards"]

        def per_board(cls: type, name: str, doc: str, key: str, scale: float = 1.0) -> Metric:
            fam = cls(name, doc, labels=["board"])
            for r in boards:
                if r.get(key) is not None:
                    fam.add_metric([r["name"]], r[key] * scale)
            return fam

        yield per_board(
            CounterMetricFamily, "listenpost_readings", "Readings stored, per board.", "readings_total"
        )
        yield per_board(
            CounterMetricFamily,
            "listenpost_gap_readings",
            "Readings a board reported lost (spool overflow, corruption), per board.",
            "gap_readings",
        )
        yield per_board(
            CounterMetricFamily,
            "listenpost_adverts",
            "Advertisements the board's radio heard (all devices), from its latest heartbeat.",
            "adverts_total",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_readings_per_second",
            "Readings stored per second over the last two minutes, per board.",
            "readings_per_s",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_tag_rate_median_hertz",
            "Median over the tags a board heard recently of its readings per tag per second, "
            "from its latest heartbeat (far below the tags' advertising rate: the radio misses adverts).",
            "tag_rate_hz_median",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_clock_offset_seconds",
            "Collector time minus board monotonic time at the fit's reference point.",
            "clock_offset_ms",
            1e-3,
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_clock_skew_ppm",
            "Board clock rate error against the collector, parts per million (positive: fast).",
            "clock_skew_ppm",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_wall_clock_error_seconds",
            "Board wall clock minus collector time (health figure; readings do not use it).",
            "wall_error_ms",
            1e-3,
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_heartbeat_age_seconds",
            "Seconds since the board's latest heartbeat.",
            "heartbeat_age_s",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_last_contact_age_seconds",
            "Seconds since the board's latest heartbeat or batch.",
            "last_contact_age_s",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_spool_backlog_batches",
            "Sealed batches waiting in the board's spool, from its latest heartbeat.",
            "spool_backlog_batches",
        )
        yield per_board(
            GaugeMetricFamily,
            "listenpost_spool_backlog_bytes",
            "Bytes waiting in the board's spool, from its latest heartbeat.",
            "spool_backlog_bytes",
        )

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
