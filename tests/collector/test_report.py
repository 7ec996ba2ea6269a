"""
``listenpost collector report`` against the demo venue: the real collector on loopback and real agents
replaying the recordings for a few minutes of virtual time (g2-a's radio hangs at 4 min, u3-a loses
power at 6 min, u2-a's crystal is 85 ppm fast), one board calibrated and a walk test given; then the
HTML file in headless Chromium at desktop and phone widths, and printed to A4.
"""

from __future__ import annotations

import asyncio
import dataclasses
import math
import re
from dataclasses import dataclass
from pathlib import Path

import pytest
import structlog

from listenpost.collector.report import ReportData, coverage_gaps, render, state_segments
from listenpost.core.clock import VirtualClock
from listenpost.demo import DEMO_LIVENESS
from listenpost.demo.fleet import Fleet
from listenpost.sim.truth import Truth, read_truth
from tests.collector.test_health_page import CHROMIUM, CHROMIUM_ARGS, WIDTHS, _browser_or_skip
from tests.e2e.conftest import REPLAY_LOGS, cli, cli_async, quiet_logs

pytestmark = pytest.mark.timeout(600)

RUN_S = 400.0
"""Virtual seconds of the venue: past g2-a's radio hang (240 s) and u3-a's power cut (360 s)."""
SECTIONS = {
    "states": 2,  # one plot per floor: ground and upper
    "readings": 1,
    "coverage": 1,
    "losses": 0,  # nothing was lost in this run: a sentence says so (test_losses_are_drawn draws some)
    "clock": 1,
    "calibration": 1,
    "walktest": 1,
}
"""Plots each section must hold for this run."""


@dataclass
class ReportRun:
    venue: Truth
    html: Path
    plain: Path
    """The same span without a walk test."""
    out: str
    calibrated: str
    ref_room: str


def _reference(venue: Truth) -> tuple[str, str, str, float]:
    """The first reference tag: (id, room label, the nearest board in its room, distance m)."""
    from listenpost.core.identity import parse_tag_id
    from listenpost.sim.scenario import load_scenario

    tags = load_scenario(str(venue.document["scenario"])).tags
    ref = tags.reference[0]
    tag = parse_tag_id(f"ibeacon:{tags.venue_uuid}:{tags.reference_major}:{ref.minor}")
    docs = venue.document["boards"]
    mine = [
        (name, math.dist(d["pos_m"], ref.place.at)) for name, d in docs.items() if d["room"] == ref.place.room
    ]
    name, dist = min(mine, key=lambda x: x[1])
    label = next(b.room_label for b in venue.boards if b.name == name)
    return tag, label, name, dist


async def _run(base: Path) -> ReportRun:
    venue = read_truth(REPLAY_LOGS)
    fleet = Fleet(
        venue, base / "run", VirtualClock(start=1000.0, wall=venue.start_wall), liveness=DEMO_LIVENESS
    )
    tag, room, board, dist = _reference(venue)
    try:
        await fleet.start()
        await fleet.run_until(RUN_S, step_s=1.0)
        common = ["--collector", fleet.url, "--state-dir", str(fleet.state_dir), "--timeout", "120"]
        code, out = await cli_async(
            [
                "collector",
                "calibrate",
                board,
                "--tag",
                tag,
                "--distance",
                f"{dist:.2f}",
                "--minutes",
                "3",
                *common,
            ]
        )
        assert code == 0, out
        marks = base / "marks.csv"
        t0 = venue.start_wall
        marks.write_text(f"room,from,to\n{room},{t0 + 60!r},{t0 + 300!r}\n")  # noqa: ASYNC240
        span = ["--from", repr(t0), "--to", repr(t0 + RUN_S)]
        report = base / "report" / "day.html"
        code, out = await cli_async(
            [
                "collector",
                "report",
                *span,
                "--out",
                str(report),
                "--walk-tag",
                tag,
                "--walk-marks",
                str(marks),
            ]
            + common
        )
        assert code == 0, out
        plain = base / "report" / "plain.html"
        code, out2 = await cli_async(["collector", "report", *span, "--out", str(plain), *common])
        assert code == 0, out2
    finally:
        await fleet.close()
    return ReportRun(venue, report, plain, out, board, room)


@pytest.fixture(scope="module")
def run(tmp_path_factory: pytest.TempPathFactory) -> ReportRun:
    base = tmp_path_factory.mktemp("report")
    fh = quiet_logs(base / "run.log")
    try:
        return asyncio.run(_run(base))
    finally:
        fh.close()
        structlog.reset_defaults()


def _section(text: str, key: str) -> str:
    m = re.search(rf'<section id="{key}">(.*?)</section>', text, re.S)
    assert m, key
    return m.group(1)


def test_report_holds_every_section_and_its_plots(run: ReportRun):
    text = run.html.read_text(encoding="utf-8")
    print(f"\nreport: {run.html} ({len(text):,} bytes); {run.out.strip()}")
    for key, n in SECTIONS.items():
        assert _section(text, key).count("<svg ") == n, key
    # Self-contained: no script, and every reference points inside the page (SVG clip paths, hatches).
    assert "<script" not in text
    assert not re.search(r'\b(src|href)="(?!#|data:)', text) and not re.search(r"url\((?!#)", text)
    ids = re.findall(r'\bid="([^"]+)"', text)
    assert len(ids) == len(set(ids)), "ids repeat across the inline plots"
    states = _section(text, "states")
    assert "u3-a" in states and "became silent" in states  # the power cut
    assert "became deaf" in states  # g2-a's radio
    assert "no board&#x27;s reference-tag level moved" in _section(text, "calibration")
    assert "became drifting" in states  # u2-a's crystal
    # Every board's first verdict is one line, not sixteen rows. When depends on how soon each agent's
    # first request lands, which real sockets on a busy machine can delay.
    first = re.search(r"<p>((?:\d+ boards? first judged [a-z ]+ by 08:00:\d\d(?:; )?)+)</p>", states)
    assert first, states
    verdicts = re.findall(r"(\d+) boards? first judged ([a-z ]+) by 08:00:(\d\d)", first.group(1))
    # No board is judged before it speaks (the monitor waits silent_after_s after an enrolment), so every
    # first verdict is "live".
    assert [(n, s) for n, s, _ in verdicts] == [("16", "live")], verdicts
    assert int(verdicts[0][2]) <= 20, verdicts
    assert "(was not yet seen)" not in states
    coverage = _section(text, "coverage")
    # Before the first verdict nobody is judged: only the rooms whose boards failed have gaps.
    assert "<td>G0 Foyer</td><td class=n>0 s</td>" in coverage
    assert "<td>G2 Sound Lab</td><td class=n>2 min</td>" in coverage
    assert "No board lost a batch" in _section(text, "losses")
    clock = _section(text, "clock")
    assert re.search(r"<td>u2-a</td><td class=n>[0-9.]+</td><td class=n>\+[89][0-9]\.[0-9]</td>", clock)
    cal = _section(text, "calibration")
    assert f"<td>{run.calibrated}</td>" in cal and "never" in cal
    walk = _section(text, "walktest")
    assert f"<td>{run.ref_room}</td>" in walk
    plain = run.plain.read_text(encoding="utf-8")
    assert "does not store walk tests" in _section(plain, "walktest")
    assert _section(plain, "walktest").count("<svg ") == 0


def test_report_in_a_browser_fits_a_phone_and_prints_on_a4(run: ReportRun, tmp_path: Path):
    _browser_or_skip()
    asyncio.run(_browse(run, tmp_path))


async def _browse(run: ReportRun, tmp_path: Path) -> None:
    from playwright.async_api import async_playwright

    shots = tmp_path / "screenshots"
    shots.mkdir()
    print(f"\nscreenshots: {shots}")
    async with async_playwright() as pw:
        browser = await pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            for wname, (w, h) in WIDTHS.items():
                page = await browser.new_page(viewport={"width": w, "height": h})
                requests: list[str] = []
                page.on("request", lambda r, seen=requests: seen.append(r.url))
                await page.goto(run.html.as_uri(), timeout=15_000)
                assert requests == [run.html.as_uri()]  # nothing fetched beyond the file itself
                for key, n in SECTIONS.items():
                    shown = await page.locator(f"section#{key} svg.plot").count()
                    assert shown == n, (wname, key, shown)
                    box = await page.locator(f"section#{key}").bounding_box()
                    assert box is not None and box["height"] > 0
                width = await page.evaluate(
                    "() => [document.scrollingElement.scrollWidth, window.innerWidth]"
                )
                assert width[0] <= width[1], (wname, width)
                await page.screenshot(path=str(shots / f"report-{wname}.png"), full_page=True)
                await page.screenshot(path=str(shots / f"report-{wname}-top.png"))
                await page.close()
            page = await browser.new_page()
            await page.goto(run.html.as_uri(), timeout=15_000)
            await page.emulate_media(media="print")
            pdf = shots / "report-a4.pdf"
            await page.pdf(path=str(pdf), format="A4", prefer_css_page_size=True)
            assert pdf.read_bytes().startswith(b"%PDF")  # noqa: ASYNC230
            await page.set_viewport_size({"width": 718, "height": 1000})  # A4 less the margins, at 96 dpi
            width = await page.evaluate("() => [document.scrollingElement.scrollWidth, window.innerWidth]")
            assert width[0] <= width[1], ("print", width)
        finally:
            await browser.close()


@pytest.mark.parametrize(
    ("argv", "field"),
    [
        (["--from", "2026-01-02", "--to", "2026-01-01"], "--to"),
        (["--from", "yesterday", "--to", "2026-01-01"], "--from"),
        (["--from", "0", "--to", "10", "--walk-tag", "ibeacon:x"], "--walk-tag"),
    ],
)
def test_bad_report_arguments_name_the_option(
    argv: list[str], field: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
):
    out = tmp_path / "r.html"
    code, _ = cli(["collector", "report", *argv, "--out", str(out), "--collector", "http://127.0.0.1:9"])
    assert code == 2 and field in capsys.readouterr().err
    assert not out.exists()


def _data(**kw: object) -> ReportData:
    """A small fleet's report data: two boards in one room, one alone in another, 10 minutes."""
    t0 = 1_800_000_000.0
    rows = [
        {"name": "a-1", "room": "A", "floor": "ground", "state": "live", "gap_readings": 0},
        {"name": "a-2", "room": "A", "floor": "ground", "state": "silent", "gap_readings": 120},
        {"name": "b-1", "room": "B", "floor": "upper", "state": "deaf", "gap_readings": 0},
    ]
    for r in rows:
        r.update(clock_residual_ms=0.4, clock_skew_ppm=3.0, clock_steps=0, clock_exchanges_refused=0)

    def change(i: int, at: float, board: str, old: str | None, new: str) -> dict[str, object]:
        return {
            "id": i,
            "at": t0 + at,
            "board": board,
            "kind": "state_changed",
            "detail": {"old": old, "new": new},
        }

    events = [
        change(1, 5, "a-1", None, "live"),
        change(2, 5, "a-2", None, "live"),
        change(3, 5, "b-1", None, "live"),
        change(4, 200, "a-2", "live", "silent"),
        change(5, 300, "b-1", "live", "deaf"),
        {
            "id": 6,
            "at": t0 + 400,
            "board": "a-2",
            "kind": "loss",
            "detail": {"first_seq": 7, "last_seq": 9, "batches": 3},
        },
        {
            "id": 7,
            "at": t0 + 450,
            "board": "a-1",
            "kind": "calibration_shift",
            "detail": {
                "shift_db": -6.2,
                "tags": 2,
                "since": t0 + 150,
                "threshold_db": 3.0,
                "window_s": 300.0,
            },
        },
    ]
    boards = [
        {"name": "a-1", "offset_db": 0.0, "calibrations": []},
        {
            "name": "a-2",
            "offset_db": -2.5,
            "calibrations": [
                {"at": t0 + 100, "offset_db": -1.0, "spread_db": 1.5, "samples": 80},
                {"at": t0 + 500, "offset_db": -2.5, "spread_db": 0.8, "samples": 90},
            ],
        },
        {"name": "b-1", "offset_db": 0.0, "calibrations": []},
    ]
    args: dict[str, object] = {
        "t_from": t0,
        "t_to": t0 + 600,
        "collector": "http://127.0.0.1:8470",
        "status": {"at": t0 + 600, "boards": rows, "fleet": {"boards": 3, "tags": 4}},
        "boards": boards,
        "events": events,
        "bin_s": 60.0,
        "readings": {("a-1", t0 + 60 * k): 100 for k in range(10)} | {("b-1", t0): 50},
    }
    args.update(kw)
    return ReportData(**args)  # type: ignore[arg-type]


def test_losses_are_drawn_with_their_cause_and_gaps_follow_the_states():
    data = _data()
    gaps = coverage_gaps(data, state_segments(data))
    # Room A keeps a live board throughout; room B has none from b-1 going deaf at 300 s. The first
    # 5 s, before any verdict, are no gap.
    assert gaps == {"A": [], "B": [(data.t_from + 300, data.t_from + 600)]}
    text = render(data)
    losses = text[text.index('<section id="losses">') :]
    losses = losses[: losses.index("</section>")]
    assert losses.count("<svg ") == 1
    assert "3 batches never arrived" in losses and "120 readings" in losses
    cal = text[text.index('<section id="calibration">') :]
    assert cal.count("<svg ", 0, cal.index("</section>")) == 1
    assert "<td class=n>-1.5</td>" in cal  # the shift between a-2's two calibrations
    # The calibration watch's event: board, when flagged, since when, its size and how many tags agreed.
    assert "<td>a-1</td><td>08:07:30</td><td>08:02:30</td><td class=n>-6.2</td><td class=n>2</td>" in cal
    assert "does not store walk tests" in text


def test_first_verdicts_are_one_line_counted_per_state():
    """The boards' first verdicts read as one sentence, per state, with the number agreeing ("1 board")."""
    data = _data()
    events = [dict(e) for e in data.events]
    events[2] = {**events[2], "at": data.t_from + 7, "detail": {"old": None, "new": "late"}}
    text = render(dataclasses.replace(data, events=events))
    states = text[text.index('<section id="states">') :]
    states = states[: states.index("</section>")]
    assert "<p>2 boards first judged live by 08:00:05; 1 board first judged late by 08:00:07</p>" in states
    assert "(was not yet seen)" not in states  # no table row for a first verdict
