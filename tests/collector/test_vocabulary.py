"""
One vocabulary: the page, ``collector status``, ``/v1/status`` and ``/metrics`` name each figure of
one fleet state the same way and show the same value.
"""

from __future__ import annotations

import asyncio
import io
import re

import pytest
from prometheus_client.parser import text_string_to_metric_families

from listenpost.cli import main
from listenpost.collector.status import FIGURE, FIGURES
from listenpost.collector.web.metrics import metric_help
from listenpost.collector.web.pages import CARD_FIGURES
from listenpost.core.logs import configure
from tests.collector.test_health_page import build_fleet


async def run_status(client, monkeypatch, capsys) -> str:
    """``collector status`` against the test collector, with no admin token anywhere."""
    monkeypatch.delenv("LISTENPOST_ADMIN_TOKEN", raising=False)
    monkeypatch.setattr("listenpost.collector.cli.DEFAULT_STATE_DIR", "/nonexistent/listenpost-state")
    capsys.readouterr()
    url = str(client.make_url("")).rstrip("/")
    rc = await asyncio.to_thread(main, ["collector", "status", "--collector", url])
    out, err = capsys.readouterr()
    assert rc == 0, err
    return out


async def test_collector_status_needs_no_admin_token(aiohttp_client, tmp_path, clock, monkeypatch, capsys):
    """``/v1/status`` is public, so the command that reads it asks for no token (before: exit 2)."""
    configure("json", stream=io.StringIO())
    client, _ = await build_fleet(aiohttp_client, tmp_path, clock)
    out = await run_status(client, monkeypatch, capsys)
    assert "6 boards" in out and "Needs attention, most urgent first:" in out
    attention = out[out.index("Needs attention") :]
    assert (
        attention.index("u3-a") < attention.index("g2-a") < attention.index("u2-a") < attention.index("g3-b")
    )
    assert "run: sudo systemctl restart listenpost-agent   (on the board)" in attention


async def test_one_name_and_one_value_per_figure_everywhere(
    aiohttp_client, tmp_path, clock, monkeypatch, capsys
):
    configure("json", stream=io.StringIO())
    client, _ = await build_fleet(aiohttp_client, tmp_path, clock)
    # The virtual clock stands still between the four requests: the ages agree to the digit.
    doc = await (await client.get("/v1/status")).json()
    rows = {r["name"]: r for r in doc["boards"]}
    metrics_text = await (await client.get("/metrics")).text()
    page = await (await client.get("/")).text()
    cli_out = await run_status(client, monkeypatch, capsys)

    # /v1/status: the vocabulary travels with the document.
    assert doc["figures"] == {f.key: {"label": f.label, "unit": f.unit, "help": f.help} for f in FIGURES}
    assert all(f.key in row for f in FIGURES for row in rows.values())

    # /metrics: one family per figure, its HELP the figure's label and help, its values the rows'.
    families = {f.name: f for f in text_string_to_metric_families(metrics_text)}
    for f in FIGURES:
        fam = families[f.metric]
        assert (
            fam.documentation == metric_help(f)
            and f.label in fam.documentation
            and f.help in fam.documentation
        )
        assert fam.type == ("counter" if f.counter else "gauge")
        values = {s.labels["board"]: s.value for s in fam.samples}
        expect = {n: r[f.key] * f.scale for n, r in rows.items() if r[f.key] is not None}
        assert values == pytest.approx(expect), f.key

    # The page: each card lists its figures under their labels, with the shared text of the value.
    for name, row in rows.items():
        card = page[page.index(f'data-board="{name}"') :]
        card = card[: card.index("</article>")]
        shown = dict(
            re.findall(r'<dt>([^<]*)</dt><dd data-figure="[^"]+"(?: class="off")?>([^<]*)</dd>', card)
        )
        assert shown == {FIGURE[k].label: FIGURE[k].text(row[k]) for k in CARD_FIGURES}, name
    glossary = page[page.index('id="glossary"') :]
    assert all(f"<dt>{FIGURE[k].heading()}</dt>" in glossary for k in CARD_FIGURES)

    # collector status: the same labels as column headings, the same texts in the cells.
    lines = cli_out.splitlines()
    header = re.split(r"\s{2,}", lines[1].strip())
    from listenpost.collector.cli import STATUS_FIGURES

    assert header == ["Board", "Room", "State", *(FIGURE[k].label for k in STATUS_FIGURES)]
    for line in lines[3 : 3 + len(rows)]:
        cells = re.split(r"\s{2,}", line.strip())
        row = rows[cells[0]]
        assert cells[3:] == [FIGURE[k].text(row[k]) for k in STATUS_FIGURES], cells
    assert set(STATUS_FIGURES) <= set(CARD_FIGURES)
