"""
The health page in a real headless browser, against a real collector on loopback whose boards were
driven into different states by the monitor on virtual time.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path
from typing import Any

import pytest
from aiohttp.test_utils import TestClient

from listenpost.collector.monitor import MONITOR
from listenpost.core.clock import DerivedClock, VirtualClock
from tests.collector.test_api import batch_body, enrolled, import_tags, make_client, readings

CHROMIUM = "/usr/bin/chromium"
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]


class VirtualBoard:
    """A board on the wire only: heartbeats with clock exchanges and small batches, on a derived clock."""

    def __init__(self, name: str, room: str, clock: VirtualClock, *, skew_ppm: float = 0.0) -> None:
        self.name, self.room = name, room
        self.clock = DerivedClock(
            clock, skew_ppm=skew_ppm, boot_at=clock.monotonic() - 100.0, boot_id=f"boot-{name}"
        )
        self.auth: dict[str, str] = {}
        self.prev: dict[str, float] | None = None
        self.seq = 0
        self.adverts = 0
        self.spool = 0
        self.tag_rate_hz: float | None = None
        """What the board's heartbeat says of its readings per tag per second (None: an older agent)."""

    async def enroll(self, client: TestClient, tmp_path: Path) -> None:
        self.auth = await enrolled(client, tmp_path, self.name, self.room)

    async def beat(self, client: TestClient, *, hear: int = 50) -> None:
        self.adverts += hear
        t1 = self.clock.monotonic()
        body = {
            "board": self.name,
            "boot": self.clock.boot_id,
            "t1": t1,
            "clock": self.prev,
            "wall": self.clock.time(),
            "stats": {"pipeline": {"adverts_total": self.adverts}, "spool": {"batches": self.spool}},
        }
        if self.tag_rate_hz is not None:
            body["stats"].update(tag_rate_hz_median=self.tag_rate_hz, tags_heard=5)
        r = await client.post("/v1/heartbeat", json=body, headers=self.auth)
        assert r.status == 200, await r.text()
        doc = await r.json()
        # 2 ms out, 3 ms back on the board's clock: the loopback takes no virtual time at all.
        self.prev = {"t1": t1 - 0.002, "t2": doc["t2"], "t3": doc["t3"], "t4": t1 + 0.003}

    async def send(self, client: TestClient, n: int = 12) -> None:
        t = self.clock.monotonic()
        body = batch_body(self.name, self.seq, readings(n, t0_s=t - 5), boot=self.clock.boot_id, t1=t)
        r = await client.post("/v1/batches", json=body, headers=self.auth)
        assert r.status == 200, await r.text()
        self.seq += 1


async def build_fleet(
    aiohttp_client, tmp_path: Path, clock: VirtualClock
) -> tuple[TestClient, dict[str, Any]]:
    """
    Five boards, 36 rounds of 10 s with a monitor round each, ending in:
    g0-a live · u3-a silent (stopped at round 5) · g2-a deaf (radio hears nothing from round 8) ·
    u2-a drifting (+85 ppm crystal) · g3-b backlogged (spool grows every round) · u5-a never enrolled.
    """
    client = await make_client(aiohttp_client, tmp_path, clock)
    await import_tags(client, tmp_path)
    boards = {
        "g0-a": VirtualBoard("g0-a", "G0 Foyer", clock),
        "u3-a": VirtualBoard("u3-a", "U3 Machines", clock, skew_ppm=-12),
        "g2-a": VirtualBoard("g2-a", "G2 Sound Lab", clock, skew_ppm=8),
        "u2-a": VirtualBoard("u2-a", "U2 Body Works", clock, skew_ppm=85),
        "g3-b": VirtualBoard("g3-b", "G3 Weather Hall", clock, skew_ppm=-20),
    }
    # Tags advertise at 2 Hz in the venue: g0-a's radio delivers nearly all of it, g2-a's far fewer.
    boards["g0-a"].tag_rate_hz, boards["g2-a"].tag_rate_hz = 1.95, 0.35
    for b in boards.values():
        await b.enroll(client, tmp_path)
    r = await client.post(
        "/v1/admin/boards",
        json={"name": "u5-a", "room": "U5 Workshop", "floor": "upper"},
        headers={"Authorization": "Bearer " + (tmp_path / "admin-token").read_text().strip()},
    )
    assert r.status == 201
    monitor = client.app[MONITOR]
    for k in range(36):
        for name, b in boards.items():
            if name == "u3-a" and k >= 5:
                continue
            if name == "g3-b":
                b.spool += 1
            await b.beat(client, hear=0 if name == "g2-a" and k >= 8 else 50)
            if name in ("g0-a", "u2-a"):
                await b.send(client)
        await clock.advance(10)
        await monitor.run_once()
    return client, boards


@pytest.fixture
async def fleet(aiohttp_client, tmp_path, clock):
    return await build_fleet(aiohttp_client, tmp_path, clock)


async def test_fleet_states_in_status_json(fleet):
    client, _ = fleet
    doc = await (await client.get("/v1/status")).json()
    states = {r["name"]: r["state"] for r in doc["boards"]}
    assert states == {
        "g0-a": "live",
        "u3-a": "silent",
        "g2-a": "deaf",
        "u2-a": "drifting",
        "g3-b": "backlogged",
        "u5-a": "unknown",
    }
    rows = {r["name"]: r for r in doc["boards"]}
    assert rows["u2-a"]["clock_skew_ppm"] == pytest.approx(85, abs=2)
    assert rows["g0-a"]["clock_skew_ppm"] == pytest.approx(0, abs=2)
    assert rows["g0-a"]["readings_total"] == 36 * 12
    assert rows["u3-a"]["last_contact_age_s"] == pytest.approx(320, abs=1)  # last beat at round 4 of 36
    # 12 readings per 10 s round, sampled by the monitor every round: 1.2 readings/s (hand computation).
    assert rows["g0-a"]["readings_per_s"] == pytest.approx(1.2) and rows["u2-a"][
        "readings_per_s"
    ] == pytest.approx(1.2)
    assert rows["g2-a"]["readings_per_s"] == 0.0 and rows["u3-a"]["readings_per_s"] == 0.0
    assert (rows["g0-a"]["tag_rate_hz_median"], rows["g2-a"]["tag_rate_hz_median"]) == (1.95, 0.35)
    assert rows["u3-a"]["tag_rate_hz_median"] is None and rows["u5-a"]["readings_per_s"] is None
    kinds = [(e["board"], e["detail"].get("new")) for e in doc["events"] if e["kind"] == "state_changed"]
    assert ("u3-a", "silent") in kinds and ("g2-a", "deaf") in kinds


async def test_page_renders_without_javascript(fleet):
    client, _ = fleet
    r = await client.get("/")
    html = await r.text()
    assert r.status == 200 and r.content_type == "text/html"
    assert 'data-board="g2-a" data-state="deaf"' in html
    row = html[html.index('data-board="g0-a"') :]
    row = row[: row.index("</tr>")]
    assert '<td class="num rate">1.2/s</td>' in row and ">1.95 Hz</td>" in row
    assert (
        "http://" not in html.replace(str(client.make_url("/")), "") and "https://" not in html
    )  # no external assets


def _browser_or_skip() -> None:
    if not shutil.which(CHROMIUM) and not Path(CHROMIUM).exists():
        if os.environ.get("LISTENPOST_REQUIRE_BROWSER") == "1":
            pytest.fail(f"{CHROMIUM} is missing and LISTENPOST_REQUIRE_BROWSER=1")
        pytest.skip(f"browser test: {CHROMIUM} not installed")


@pytest.mark.browser
async def test_health_page_in_a_real_browser(aiohttp_client, tmp_path, clock):
    _browser_or_skip()
    from playwright.async_api import async_playwright

    client, boards = await build_fleet(aiohttp_client, tmp_path, clock)
    url = str(client.make_url("/?refresh=0.3"))
    async with async_playwright() as pw:
        browser = await pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            page = await browser.new_page(viewport={"width": 1700, "height": 900})
            await page.goto(url, timeout=15_000)
            rows = page.locator("#boards tbody tr")
            assert await rows.count() == 6
            seen = {}
            for i in range(6):
                row = rows.nth(i)
                seen[await row.get_attribute("data-board")] = (
                    await row.locator("td.st").inner_text()
                ).strip()
            assert seen["g0-a"].endswith("live") and seen["u3-a"].endswith("silent")
            assert seen["g2-a"].endswith("deaf") and seen["u2-a"].endswith("drifting")
            assert seen["g3-b"].endswith("backlogged") and seen["u5-a"].endswith("not yet seen")
            # Colour is not the only signal, but it is there: silent and live badges differ.
            live_bg = await page.locator('tr[data-board="g0-a"] .state').evaluate(
                "e => getComputedStyle(e).backgroundColor"
            )
            silent_bg = await page.locator('tr[data-board="u3-a"] .state').evaluate(
                "e => getComputedStyle(e).backgroundColor"
            )
            assert live_bg != silent_bg
            cell = page.locator('tr[data-board="g0-a"] td.readings')
            before = await cell.inner_text()
            assert before == f"{36 * 12:,}"
            # New readings arrive; the script's refresh must show them without a reload.
            await boards["g0-a"].send(client, n=30)
            await page.wait_for_function(
                "() => document.querySelector('tr[data-board=\"g0-a\"] td.readings').textContent === '462'",
                timeout=10_000,
            )
            assert await page.locator("#refresh-state").inner_text() == ""
            # The redrawn rows carry the rates too (the script's formatting, not the server's).
            assert await page.locator('tr[data-board="g0-a"] td.rate').inner_text() == "1.2/s"
            assert await page.locator('tr[data-board="g2-a"] td.tagrate').inner_text() == "0.35 Hz"
            assert await page.locator('tr[data-board="u3-a"] td.tagrate').inner_text() == "–"
            shot = tmp_path / "health.png"
            await page.screenshot(path=str(shot), full_page=True)
            assert shot.stat().st_size > 10_000
            if os.path.isdir("/tmp/lp"):  # noqa: ASYNC240 (a copy for people to look at; not committed)
                shutil.copyfile(shot, "/tmp/lp/health2.png")
        finally:
            await browser.close()


@pytest.mark.parametrize(
    ("seconds", "text"),
    [
        (None, "–"),
        (0.04, "0.0 s"),
        (-0.3, "−0.3 s"),
        (59.94, "59.9 s"),
        (-250, "−4 min 10 s"),
        (-11520, "−3 h 12 min"),
        (7260, "2 h 1 min"),
    ],
)
def test_wall_clock_error_reads_in_hours_and_minutes(seconds, text):
    """A board hours off (no network time) shows "−3 h 12 min", not "-11,520.0 s"."""
    from listenpost.collector.status import fmt_clock_error

    assert fmt_clock_error(seconds) == text
