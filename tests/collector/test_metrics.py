"""``/metrics`` parsed by prometheus_client's own parser (docs/references.md §8) and checked against the fleet."""

from __future__ import annotations

import pytest
from prometheus_client.parser import text_string_to_metric_families

from tests.collector.test_health_page import build_fleet


async def test_metrics_parse_and_match_the_fleet(aiohttp_client, tmp_path, clock):
    client, boards = await build_fleet(aiohttp_client, tmp_path, clock)
    r = await client.get("/metrics")
    assert r.status == 200
    assert r.headers["Content-Type"].startswith("text/plain; version=0.0.4")
    # Reference parser: prometheus_client.parser.text_string_to_metric_families (PyPI prometheus_client,
    # the Prometheus text exposition format 0.0.4); it raises ValueError on malformed input.
    families = {f.name: f for f in text_string_to_metric_families(await r.text())}
    assert all(name.startswith("listenpost_") for name in families)
    # Counters: the family name drops "_total", the samples keep it (docs/references.md §8, observed behaviour).
    assert families["listenpost_readings"].type == "counter"
    readings = {s.labels["board"]: s.value for s in families["listenpost_readings"].samples}
    assert {s.name for s in families["listenpost_readings"].samples} == {"listenpost_readings_total"}
    assert readings["g0-a"] == 36 * 12 and readings["u2-a"] == 36 * 12 and readings["g2-a"] == 0
    batches = {s.labels["status"]: s.value for s in families["listenpost_batches"].samples}
    assert batches["stored"] == 72 and batches["duplicate"] == 0 and batches["conflict"] == 0
    by_state = {s.labels["state"]: s.value for s in families["listenpost_boards"].samples}
    assert (
        by_state["live"],
        by_state["silent"],
        by_state["deaf"],
        by_state["drifting"],
        by_state["backlogged"],
    ) == (1, 1, 1, 1, 1)
    one_hot = {
        (s.labels["board"], s.labels["state"]): s.value for s in families["listenpost_board_state"].samples
    }
    assert one_hot[("u3-a", "silent")] == 1 and one_hot[("u3-a", "live")] == 0
    skew = {s.labels["board"]: s.value for s in families["listenpost_clock_skew_ppm"].samples}
    assert skew["u2-a"] == pytest.approx(85, abs=2) and skew["g3-b"] == pytest.approx(-20, abs=2)
    age = {s.labels["board"]: s.value for s in families["listenpost_heartbeat_age_seconds"].samples}
    assert age["u3-a"] == pytest.approx(320, abs=1) and age["g0-a"] == pytest.approx(10, abs=1)
    backlog = {s.labels["board"]: s.value for s in families["listenpost_spool_backlog_batches"].samples}
    assert backlog["g3-b"] == 36
    offset = {s.labels["board"]: s.value for s in families["listenpost_clock_offset_seconds"].samples}
    # g0-a's clock has no skew, so collector − board time is the same at every reference point.
    assert offset["g0-a"] == pytest.approx(clock.time() - boards["g0-a"].clock.monotonic(), abs=0.01)
    rate = {s.labels["board"]: s.value for s in families["listenpost_readings_per_second"].samples}
    assert rate["g0-a"] == pytest.approx(1.2) and rate["g2-a"] == 0.0  # 12 readings per 10 s round
    assert families["listenpost_tag_rate_median_hertz"].type == "gauge"
    tag_rate = {s.labels["board"]: s.value for s in families["listenpost_tag_rate_median_hertz"].samples}
    assert tag_rate == {"g0-a": 1.95, "g2-a": 0.35}  # only boards whose heartbeat carries it
    assert "listenpost_readings_created" not in families  # no _created series from our collector
