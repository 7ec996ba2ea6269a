"""
Smoke run of the benchmark harness: every bench in its smallest setting (``--quick``), checking the
shape of what it prints, never a speed. ``footprint`` builds a wheel and two environments (minutes,
network for pip), so it is left to ``make bench``.
"""

from __future__ import annotations

import json
import re

import pytest

from bench.__main__ import main

RATIO = re.compile(
    r"ratio .+ = \d+\.\d\d median of (\d+) \(min-max \d+\.\d\d-\d+\.\d\d, IQR \d+\.\d\d-\d+\.\d\d(; target .+)?\)"
)
EXPECTED = {
    "agent_live": 3,
    "agent_pipeline": 1,
    "ingest_store": 2,  # the PostgreSQL one only with a server
    "ingest_http": 2,
    "spool_io": 1,  # 2 where the directory sits on a block device (write_bytes counted)
    "clock_fit": 1,
}


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_each_bench_runs_quick_and_prints_ratios_with_spread(name, tmp_path, capsys):
    out_json = tmp_path / "ratios.json"
    assert main(["--quick", "--json", str(out_json), name]) == 0
    out = capsys.readouterr().out
    assert out.startswith("machine: ") and f"== bench.{name}" in out
    lines = [line.strip() for line in out.splitlines() if line.strip().startswith("ratio ")]
    assert all(RATIO.fullmatch(line) for line in lines), lines
    data = json.loads(out_json.read_text())
    assert data["quick"] is True and data["machine"]
    skipped_pg = "postgres skipped" in out
    expected = EXPECTED[name] - (skipped_pg and name.startswith("ingest"))
    assert len(data["ratios"]) == len(lines)
    assert expected <= len(lines) <= expected + (name == "spool_io")
    for r in data["ratios"]:
        assert r["bench"] == name and len(r["values"]) >= 2
        assert min(r["values"]) <= r["median"] <= max(r["values"])
    if data["ratios"]:
        assert "== summary: ratio | median | spread min-max | IQR | repeats" in out


def test_unknown_bench_is_named():
    assert main(["no_such_bench"]) == 2
