"""
The health page in a real headless browser, against a real collector on loopback whose boards were
driven into different states by the monitor on virtual time.
"""

from __future__ import annotations

import os
import re
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
    assert rows["g2-a"]["readings_per_s"] == 0.0
    assert rows["g0-a"]["readings_rate_window_s"] == pytest.approx(120, abs=10)
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
    card = html[html.index('data-board="g0-a"') :]
    card = card[: card.index("</article>")]
    assert '<dd data-figure="readings_per_s">1.2/s</dd>' in card
    assert '<dd data-figure="tag_rate_hz_median">1.95/s</dd>' in card
    assert (
        "http://" not in html.replace(str(client.make_url("/")), "") and "https://" not in html
    )  # no external assets
    assert "<main" in html and "<table" not in html  # a landmark; no wide table to scroll sideways


async def test_page_leads_with_what_needs_a_person(fleet):
    """Troubled boards come first, most urgent first, each with the reason in words and what to do;
    the healthy rest follows, grouped by floor and room."""
    client, _ = fleet
    html = await (await client.get("/")).text()
    attention = html[html.index('id="attention"') : html.index('id="fleet"')]
    rest = html[html.index('id="fleet"') : html.index('id="events-h"')]
    order = [name for name in ("u3-a", "g2-a", "u2-a", "g3-b", "u5-a") if f'data-board="{name}"' in attention]
    assert order == ["u3-a", "g2-a", "u2-a", "g3-b", "u5-a"]
    assert sorted(order, key=attention.index) == order
    assert 'data-board="g0-a"' not in attention and 'data-board="g0-a"' in rest
    for name, words in (
        ("u3-a", "no heartbeat or batch for 5 min 20 s"),
        ("g2-a", "radio counted no advertisements"),
        ("u2-a", "clock skew +85"),
        ("g3-b", "spool grew by"),
        ("u5-a", "board reissue u5-a --bundle DIR"),
    ):
        card = attention[attention.index(f'data-board="{name}"') :]
        card = card[: card.index("</article>")]
        assert words in card, (name, card)
        assert "On site:" in card and "<code>" in card
    assert "sudo systemctl restart listenpost-agent" in attention  # the deaf board's next step
    assert 'id="fleet-h">The rest of the fleet, by floor and room' in rest and "G0 Foyer" in rest


async def test_a_silent_board_has_no_current_rate(fleet):
    """Before: a silent board showed the average of a window reaching back before its silence."""
    client, boards = fleet
    rows = {r["name"]: r for r in (await (await client.get("/v1/status")).json())["boards"]}
    assert rows["u3-a"]["state"] == "silent" and rows["u3-a"]["readings_per_s"] is None
    assert rows["u3-a"]["readings_rate_window_s"] is None


async def test_the_silent_reason_counts_to_the_same_now_as_the_age(fleet, clock):
    """
    The reason of a silent board was the monitor's text from its latest round, counted to that round's
    time, while the age beside it counted to the request: "no contact for 47 s" beside "84 s ago".
    Both now count from the same last contact to the same now.
    """
    client, _ = fleet
    await clock.advance(30)  # no monitor round since: the stored verdict is 30 s old
    row = next(r for r in (await (await client.get("/v1/status")).json())["boards"] if r["name"] == "u3-a")
    assert row["last_contact_age_s"] == pytest.approx(350, abs=1)
    m = re.search(r"for (?:(\d+) min )?(\d+) s", row["state_reason"])
    assert m, row["state_reason"]
    assert int(m[1] or 0) * 60 + int(m[2]) == pytest.approx(row["last_contact_age_s"], abs=1)


async def test_events_read_in_words(fleet):
    client, _ = fleet
    doc = await (await client.get("/v1/status")).json()
    silent = next(e for e in doc["events"] if e["board"] == "u3-a" and e["detail"].get("new") == "silent")
    assert silent["text"].startswith("became silent (was live): no contact for")
    assert "phi" not in silent["text"]
    html = await (await client.get("/")).text()
    events = html[html.index('id="events"') :]
    assert "state_changed" not in events and "phi" not in events and "became deaf (was live)" in events


async def test_spool_bytes_are_no_backlog_when_no_batch_waits(fleet):
    """A board counts sent batches in its spool bytes until its next seal removes them: with 0 batches
    waiting the byte backlog is 0, not the bytes of batches already delivered."""
    client, boards = fleet
    b = boards["g0-a"]
    b.spool = 0
    body_stats = {"spool": {"batches": 0, "bytes": 48_213}, "pipeline": {"adverts_total": b.adverts}}
    r = await client.post(
        "/v1/heartbeat",
        json={"board": b.name, "boot": b.clock.boot_id, "t1": b.clock.monotonic(), "stats": body_stats},
        headers=b.auth,
    )
    assert r.status == 200, await r.text()
    row = next(r for r in (await (await client.get("/v1/status")).json())["boards"] if r["name"] == "g0-a")
    assert (row["spool_backlog_batches"], row["spool_backlog_bytes"]) == (0, 0)


async def test_a_board_on_another_agent_version_is_flagged(fleet):
    """A board whose heartbeat reports another listenpost version than the collector's is listed with
    the reinstall step; one on the same version is not."""
    from listenpost import __version__

    client, boards = fleet
    for name, version in (("g0-a", "0.0.1"), ("u2-a", __version__)):
        b = boards[name]
        stats = {"version": version, "pipeline": {"adverts_total": b.adverts}}
        body = {"board": b.name, "boot": b.clock.boot_id, "t1": b.clock.monotonic(), "stats": stats}
        r = await client.post("/v1/heartbeat", json=body, headers=b.auth)
        assert r.status == 200, await r.text()
    rows = {r["name"]: r for r in (await (await client.get("/v1/status")).json())["boards"]}
    assert rows["g0-a"]["agent_version"] == "0.0.1"
    old = [i for i in rows["g0-a"]["attention"] if i["what"] == "Agent version differs"]
    assert len(old) == 1 and f"the collector {__version__}" in old[0]["why"]
    assert any(f"listenpost=={__version__}" in c["run"] for c in old[0]["commands"])
    assert rows["u2-a"]["agent_version"] == __version__
    assert not [i for i in rows["u2-a"]["attention"] if i["what"] == "Agent version differs"]


async def test_a_board_hours_off_in_wall_clock_needs_attention(aiohttp_client, tmp_path, clock):
    """A board whose wall clock is 3 h 12 min behind is live, but its time sync is broken: it is listed
    with the time-sync steps and its figure is marked."""
    client = await make_client(aiohttp_client, tmp_path, clock)
    b = VirtualBoard("g4-a", "G4 Planet Room", clock)
    await b.enroll(client, tmp_path)
    b.clock = DerivedClock(
        clock, boot_at=clock.monotonic() - 100.0, boot_id="boot-g4-a", wall_error_s=-11520.0
    )
    monitor = client.app[MONITOR]
    for _ in range(6):
        await b.beat(client)
        await clock.advance(10)
        await monitor.run_once()
    row = (await (await client.get("/v1/status")).json())["boards"][0]
    assert row["state"] == "live" and row["attention"][0]["what"] == "Wall clock off"
    assert "3 h 12 min behind" in row["attention"][0]["why"]
    html = await (await client.get("/")).text()
    card = html[html.index('data-board="g4-a"') :]
    assert '<dd data-figure="wall_error_ms" class="off">−3 h 12 min</dd>' in card
    assert "sudo timedatectl set-ntp true" in card


async def test_a_board_page_draws_its_last_hour(fleet):
    client, _ = fleet
    r = await client.get("/board/u2-a")
    html = await r.text()
    assert r.status == 200
    for caption in (
        'id="c-states">State',
        "Readings stored per minute",
        "Radio: adverts heard per second",
        "Clock: each exchange around the fitted line",
        "Clock: offset change since the first exchange shown",
        "Reference tag signal",
        "Spool backlog",
        "Temperature",
        "Disk free",
        "Latest events",
    ):
        assert caption in html, caption
    assert "432 readings in the window" in html  # 12 per round for 36 rounds
    assert "the slope is the rate error: +85" in html
    assert "Clock running off" in html and "became drifting (was live)" in html
    assert html.count('role="img"') == 5  # temperature, disk and reference tags: not in these heartbeats
    assert (await client.get("/board/nope")).status == 404
    r = await client.get("/board/u2-a?hours=abc")
    assert r.status == 400 and (await r.json())["error"]["field"] == "hours"


def _browser_or_skip() -> None:
    if not shutil.which(CHROMIUM) and not Path(CHROMIUM).exists():
        if os.environ.get("LISTENPOST_REQUIRE_BROWSER") == "1":
            pytest.fail(f"{CHROMIUM} is missing and LISTENPOST_REQUIRE_BROWSER=1")
        pytest.skip(f"browser test: {CHROMIUM} not installed")


WIDTHS = {"desktop": (1280, 800), "phone": (390, 844)}
PAGES = {"fleet": "/", "plan": "/plan", "board": "/board/u2-a"}
"""Every page of the technician's view, checked at both widths."""


def axe_script() -> Path:
    """axe-core 4.12.1 as bundled by the PyPI package axe-playwright-python 0.1.8 (the test extra)."""
    import axe_playwright_python

    return Path(axe_playwright_python.__file__).parent / "axe.min.js"


async def check_page(page: Any, url: str, shot: Path) -> None:
    """No sideways scrolling, no serious or critical axe-core violation, and a screenshot at ``shot``."""
    await page.goto(url, timeout=15_000)
    width = await page.evaluate("() => [document.scrollingElement.scrollWidth, window.innerWidth]")
    assert width[0] <= width[1], (url, width)
    await page.add_script_tag(path=str(axe_script()))
    result = await page.evaluate("() => axe.run(document, {resultTypes: ['violations']})")
    bad = [
        (v["id"], v["impact"], [n["target"] for n in v["nodes"]][:3])
        for v in result["violations"]
        if v["impact"] in ("serious", "critical")
    ]
    assert not bad, (url, bad)
    await page.screenshot(path=str(shot), full_page=True)
    # The first screen as well: what a phone shows before any scrolling.
    await page.screenshot(path=str(shot.with_name(shot.stem + "-top.png")))


@pytest.mark.browser
async def test_pages_in_a_real_browser(aiohttp_client, tmp_path, clock):
    """
    Each page at 1280 px and at 390 px in headless Chromium: no sideways scrolling, no serious or
    critical accessibility violation (axe-core), screenshots for people to look at; and the fleet
    page refreshes itself.
    """
    _browser_or_skip()
    from playwright.async_api import async_playwright

    from tests.collector.test_plan import PLAN

    client, boards = await build_fleet(aiohttp_client, tmp_path, clock)
    auth = {"Authorization": "Bearer " + (tmp_path / "admin-token").read_text().strip()}  # noqa: ASYNC240
    assert (await client.put("/v1/admin/plan", json=PLAN, headers=auth)).status == 200
    shots = tmp_path / "screenshots"
    shots.mkdir()
    print(f"screenshots: {shots}")
    async with async_playwright() as pw:
        browser = await pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            for wname, (w, h) in WIDTHS.items():
                page = await browser.new_page(viewport={"width": w, "height": h})
                for pname, path in PAGES.items():
                    await check_page(
                        page, str(client.make_url(path + "?refresh=0")), shots / f"{pname}-{wname}.png"
                    )
                await page.close()
            page = await browser.new_page(viewport={"width": 1280, "height": 800})
            await page.goto(str(client.make_url("/?refresh=0.3")), timeout=15_000)
            cards = page.locator("article[data-board]")
            assert await cards.count() == 6
            badge = {}
            for i in range(6):
                card = cards.nth(i)
                badge[await card.get_attribute("data-board")] = (
                    await card.locator(".state").first.inner_text()
                ).strip()
            assert badge["g0-a"].endswith("live") and badge["u3-a"].endswith("silent")
            assert badge["g2-a"].endswith("deaf") and badge["u2-a"].endswith("drifting")
            assert badge["g3-b"].endswith("backlogged") and badge["u5-a"].endswith("not yet seen")
            # Colour is not the only signal, but it is there: silent and live badges differ.
            bg = "e => getComputedStyle(e).backgroundColor"
            live_bg = await page.locator('article[data-board="g0-a"] .state').first.evaluate(bg)
            silent_bg = await page.locator('article[data-board="u3-a"] .state').first.evaluate(bg)
            assert live_bg != silent_bg
            assert await page.locator("#readings-total").inner_text() == f"{2 * 36 * 12:,}"
            # New readings arrive; the script's refresh must show them without a reload.
            await boards["g0-a"].send(client, n=30)
            await page.wait_for_function(
                "() => document.getElementById('readings-total').textContent === '894'", timeout=10_000
            )
            assert await page.locator("#refresh-state").inner_text() == ""
            assert (
                await page.locator(
                    'article[data-board="g2-a"] [data-figure="tag_rate_hz_median"]'
                ).inner_text()
                == "0.35/s"
            )
            # The plan view: a board that goes silent changes its marker at the next refresh.
            await page.goto(str(client.make_url("/plan?refresh=0.3")), timeout=15_000)
            marker = 'g[data-board="g0-a"]'
            assert await page.locator(marker).first.get_attribute("data-state") == "live"
            await clock.advance(120)  # g0-a sends nothing: past the silent limit
            await client.app[MONITOR].run_once()
            await page.wait_for_function(
                f"() => document.querySelector('{marker}').dataset.state === 'silent'", timeout=10_000
            )
            assert "g0-a silent" in (await page.locator(marker).first.text_content() or "")
            assert all(s.stat().st_size > 5_000 for s in shots.iterdir())  # noqa: ASYNC240
            if os.path.isdir("/tmp/lp"):  # noqa: ASYNC240 (copies for people to look at; not committed)
                for shot in shots.iterdir():
                    shutil.copyfile(shot, Path("/tmp/lp") / shot.name)
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
