"""
``listenpost demo``: the Brackenford Science Centre (invented, simulated) on this machine.

The collector runs in-process on 127.0.0.1 with SQLite in a fresh state directory; the 16 boards are
registered, the tag list imported and every board enrolled through the real APIs; then each board's
real agent replays its own recording from ``replay_logs/`` over HTTP on loopback, on its own clock
(true skew, boot time and wall-clock error from ``truth.json``) derived from one sped-up base clock.
``u3-a`` loses power at minute 6, ``g2-a``'s radio hangs at minute 4 (it keeps heartbeating),
``u2-a``'s crystal runs 85 ppm fast and ``g4-a``'s wall clock is 3 h 12 min behind.

At the end a table compares what the collector concluded with the truth; then the fleet calibration is
run and applied and compared with the hidden offsets, and the study-day report of the run is written to
``report.html`` in the state directory. The command exits 1 if any board ended in another state than the
one its fault calls for, or a fitted offset is off by more than the calibration tolerance.

Logs of the agents and the collector go to ``demo.log`` in the state directory (JSON lines), so the
terminal shows only the demo's own progress.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import json
import os
import sys
import tempfile
from importlib import resources
from pathlib import Path
from typing import Any

from listenpost.core.errors import ConfigError

DEFAULT_SPEED = 8.0
"""Base clock speed-up: the 10-minute recording plus half a minute takes about 80 s of real time."""
EXTRA_S = 30.0
"""Virtual seconds run after the recording ends, so the last liveness rounds see its end."""
PROGRESS_EVERY_S = 5.0
"""Real seconds between progress lines."""
STEP_S = 0.5
"""Virtual seconds between checks for power cuts and progress."""
DEMO_LIVENESS = {"deaf_window_s": 40.0}
"""The demo's liveness, stated rather than inherited: the deaf window is the collector's default (40 s),
written out because the demo's verdict for g2-a depends on it; every board here hears some device at
least every few seconds (longest gap in the recordings: 2.5 s), so 40 s of a flat advert counter is
telling, and a hung radio is flagged within a minute (docs/design.md §1)."""


def sped_up_liveness(speed: float) -> dict[str, float]:
    """
    The demo's liveness on a clock sped up ``speed`` times: every real delay (loopback, scheduling, a
    busy machine) reaches the clock exchanges multiplied by the speed, so the clock-offset residual
    tolerance is widened by the same factor; otherwise a loaded machine, not a board, would look like
    scatter.
    """
    from listenpost.collector.models.liveness import LivenessSettings  # the collector extra, at run time

    default = LivenessSettings().residual_tolerance_ms
    return {**DEMO_LIVENESS, "residual_tolerance_ms": default * max(1.0, speed)}


REPLAY_DIR = Path(str(resources.files("listenpost.replay_logs")))  # package data of the wheel


def register(sub: argparse._SubParsersAction, name: str, help_text: str) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        name,
        help=help_text,
        description=(
            "Run the collector and 16 virtual boards replaying the simulated Brackenford Science Centre on "
            "loopback, then compare what the collector concluded with the truth."
        ),
    )
    p.add_argument("--summary-json", type=Path, metavar="FILE", help="also write the summary as JSON to FILE")
    p.add_argument(
        "--speed",
        type=float,
        default=DEFAULT_SPEED,
        metavar="S",
        help="run S times faster than real time (default %(default)g)",
    )
    p.add_argument(
        "--state-dir",
        type=Path,
        metavar="DIR",
        help="collector and board state here (must be new or empty; default: a new temporary directory)",
    )
    p.add_argument(
        "--port", type=int, default=0, metavar="P", help="collector port on 127.0.0.1 (default: a free one)"
    )
    p.add_argument(
        "--keep-open",
        action="store_true",
        help="after the summary, keep the collector and boards running until Ctrl-C",
    )
    p.add_argument(
        "--replay-dir",
        type=Path,
        default=REPLAY_DIR,
        metavar="DIR",
        help="simulator output to replay (default: the project's replay_logs/)",
    )
    p.set_defaults(func=run_command)


def _state_dir(given: Path | None) -> Path:
    if given is None:
        return Path(tempfile.mkdtemp(prefix="listenpost-demo-"))
    if given.exists() and (not given.is_dir() or any(given.iterdir())):
        raise ConfigError(
            f"--state-dir: {given} is not an empty directory (the demo starts from a fresh one)"
        )
    try:
        given.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise ConfigError(f"--state-dir: {given}: cannot create: {e.strerror or e}") from e
    return given


class _LevelCounter:
    """A structlog processor that counts warnings and errors on their way to the log file."""

    def __init__(self) -> None:
        self.counts: dict[str, int] = {}

    def __call__(self, logger: Any, method_name: str, event_dict: Any) -> Any:
        if method_name in ("warning", "error", "critical", "exception"):
            self.counts[method_name] = self.counts.get(method_name, 0) + 1
        return event_dict


def _configure_logs(path: Path) -> tuple[Any, _LevelCounter]:
    import structlog

    from listenpost.core.logs import configure

    fh = open(path, "a", encoding="utf-8", buffering=1)  # noqa: SIM115 - closed at the end of the run
    configure("json", "info", stream=fh)
    counter = _LevelCounter()
    structlog.configure(processors=[counter, *structlog.get_config()["processors"]])
    return fh, counter


def run_command(args: argparse.Namespace) -> int:
    """``listenpost demo``."""
    from listenpost.sim.truth import read_truth

    if not args.speed > 0:
        raise ConfigError(f"--speed: must be > 0, got {args.speed}")
    if not 0 <= args.port <= 65535:
        raise ConfigError(f"--port: must be 0..65535, got {args.port}")
    venue = read_truth(args.replay_dir)
    state_dir = _state_dir(args.state_dir).resolve()
    fh, counter = _configure_logs(state_dir / "demo.log")
    try:
        return asyncio.run(_demo(args, venue, state_dir, counter))
    finally:
        fh.close()


def _out(line: str = "") -> None:
    sys.stdout.write(line + "\n")
    sys.stdout.flush()


async def _demo(args: argparse.Namespace, venue: Any, state_dir: Path, counter: _LevelCounter) -> int:
    from listenpost.core.clock import ScaledClock
    from listenpost.demo.fleet import Fleet

    speed = float(args.speed)
    base = ScaledClock(speed)
    fleet = Fleet(venue, state_dir, base, liveness=sped_up_liveness(speed))
    end = venue.duration_s + EXTRA_S
    _out(
        f"listenpost demo · Brackenford Science Centre (an invented venue, simulated) · {len(fleet.boards)} boards"
    )
    _out(
        f"recording {venue.duration_s / 60:g} min from {venue.directory}, run at {speed:g}x "
        f"(about {end / speed:.0f} s)"
    )
    _out(f"state directory: {state_dir}  (logs: {state_dir / 'demo.log'})")
    try:
        url = await fleet.start_collector(port=args.port)
        _out(f"health page:     {url}/")
        await fleet.start_boards()
        _out(
            f"{len(fleet.boards)} boards registered, enrolled and replaying; tags from {venue.tags_file.name}"
        )
        next_progress = [PROGRESS_EVERY_S]

        async def progress(f: Fleet) -> None:
            real = base.monotonic() / speed
            if real < next_progress[0]:
                return
            next_progress[0] = real + PROGRESS_EVERY_S
            doc = await f.status()
            states = ", ".join(
                f"{n} {s}" for s, n in sorted(doc["fleet"]["by_state"].items(), key=lambda x: -x[1])
            )
            _out(
                f"  minute {max(f.t_true(), 0.0) / 60:5.2f}  ·  {doc['fleet']['readings_total']:>9,} readings  ·  {states}"
            )

        await fleet.run_until(end, step_s=STEP_S, on_step=progress)
        summary = await fleet.summary()
        wall_s = base.monotonic() / speed
        _report(summary, venue, wall_s, speed, counter, state_dir)
        fit, calibrated = await _calibrate(fleet, venue)
        report = await _study_report(fleet, venue)
        ok = _verdict(summary, calibrated)
        if args.summary_json:
            extra = {"calibration": fit, "report": None if report is None else str(report)}
            _write_json(args.summary_json, summary, venue, url, state_dir, speed, wall_s, ok, extra)
            _out(f"summary written to {args.summary_json}")
        if args.keep_open:
            _out(
                f"\nstill serving {url}/ — the recording has ended, so states will move on from here "
                "(boards keep heartbeating but no longer hear tags). Ctrl-C to stop."
            )
            with contextlib.suppress(asyncio.CancelledError):
                await asyncio.Event().wait()
        return 0 if ok else 1
    finally:
        await fleet.close()


def _report(
    summary: list[Any], venue: Any, wall_s: float, speed: float, counter: _LevelCounter, state_dir: Path
) -> None:
    from listenpost.collector.cli import table

    def num(v: float | None, fmt: str) -> str | None:
        return None if v is None else format(v, fmt)

    rows = [
        (
            s.name,
            s.room,
            s.state if s.state == s.expected_state else f"{s.state} (expected {s.expected_state})",
            f"{s.readings_stored:,}",
            num(s.skew_est_ppm, "+.2f"),
            f"{s.skew_true_ppm:+.2f}",
            num(s.offset_est_s, ".3f"),
            num(s.offset_true_s, ".3f"),
            num(s.offset_error_ms, "+.2f"),
        )
        for s in summary
    ]
    _out()
    _out(
        table(
            rows,
            (
                "BOARD",
                "ROOM",
                "STATE",
                "READINGS",
                "SKEW est ppm",
                "true ppm",
                "OFFSET est s",
                "true s",
                "err ms",
            ),
            right=(3, 4, 5, 6, 7, 8),
        )
    )
    _out(
        "OFFSET: collector time minus the board's monotonic clock, at the newest clock exchange the collector "
        "kept for that board\n(what the collector adds to board time); err ms = estimate minus truth."
    )
    for s in summary:
        if abs(s.wall_error_true_s) > 1.0:
            est = "none" if s.wall_error_est_s is None else f"{s.wall_error_est_s:+.3f} s"
            _out(
                f"{s.name} wall clock: collector estimates {est}, truly {s.wall_error_true_s:+.3f} s "
                f"({s.wall_error_true_s / 3600:+.2f} h)"
            )
    total = sum(s.readings_stored for s in summary)
    _out(f"{total:,} readings stored in {wall_s:.0f} s of real time ({speed:g}x).")
    warn = counter.counts.get("warning", 0)
    err = sum(n for k, n in counter.counts.items() if k != "warning")
    if warn or err:
        _out(f"log: {warn} warnings, {err} errors in {state_dir / 'demo.log'}")


def _verdict(summary: list[Any], calibrated: bool) -> bool:
    """The last lines: does every board end where its fault puts it, and is every fitted offset right?"""
    wrong = [s for s in summary if s.state != s.expected_state]
    if wrong:
        _out("\nOUTCOME DIFFERS FROM THE TRUTH:")
        for s in wrong:
            _out(
                f"  {s.name}: ended {s.state} ({s.state_reason or 'no reason given'}), expected {s.expected_state}"
            )
    elif not calibrated:
        _out("\nOUTCOME DIFFERS FROM THE TRUTH: the fleet calibration (above).")
    else:
        _out(
            "\noutcome as expected: u3-a silent (power cut), g2-a deaf (radio hang), u2-a drifting (+85 ppm), "
            "all others live; every fitted offset within the calibration tolerance."
        )
    return not wrong and calibrated


async def _calibrate(fleet: Any, venue: Any) -> tuple[dict[str, Any], bool]:
    """Fleet calibration over the whole run, applied, beside the true offsets: (the collector's answer
    without its per-pair rows, whether every fitted offset is within tolerance)."""
    from listenpost.demo.outcome import CALIBRATION_TOLERANCE_DB, calibration_errors

    minutes = min(240.0, fleet.t_true() / 60.0 + 1.0)
    fit = await fleet.calibrate(minutes, apply=True)
    errors = calibration_errors(fit, venue.boards)
    worst = max(errors, key=lambda n: abs(errors[n]))
    true_n = venue.document["radio"]["exponent"]
    _out(
        f"\nfleet calibration from the venue plan's reference tags, applied: path-loss exponent "
        f"{fit['exponent']:.2f} (true {true_n:.2f}); offsets of {len(errors)} boards against the truth: "
        f"largest error {errors[worst]:+.2f} dB ({worst})"
        + (f"; no reference tag heard well enough by {', '.join(fit['unheard'])}" if fit["unheard"] else "")
    )
    # A board that hears no reference tag well enough gets no offset, and is listed: that is the venue
    # plan's limit, not an error. Every offset it gives must be right.
    problems = [f"{n} {e:+.2f} dB" for n, e in sorted(errors.items()) if abs(e) > CALIBRATION_TOLERANCE_DB]
    if problems:
        _out(
            f"CALIBRATION DIFFERS FROM THE TRUTH (tolerance {CALIBRATION_TOLERANCE_DB} dB): {', '.join(problems)}"
        )
    fit = {k: v for k, v in fit.items() if k != "pairs"}
    fit["true_exponent"] = true_n
    for b in fit["boards"]:
        b["error_db"] = errors.get(b["board"])
    return fit, not problems


async def _study_report(fleet: Any, venue: Any) -> Path | None:
    """The study-day report of the run, through the same command a researcher runs (docs/report.md)."""
    from listenpost.cli import main as cli_main

    start = fleet.clock.time() - fleet.t_true()
    out = fleet.state_dir / "report.html"
    argv = ["collector", "report", "--from", repr(start), "--to", repr(start + venue.duration_s + EXTRA_S)]
    argv += ["--out", str(out), "--collector", fleet.url, "--state-dir", str(fleet.state_dir)]
    _out("study-day report (listenpost collector report):")
    # The command runs its own event loop; this loop keeps serving the collector meanwhile.
    code = await asyncio.to_thread(cli_main, argv)
    if code != 0:
        _out(f"  the report failed (exit {code}); see {fleet.state_dir / 'demo.log'}")
        return None
    return Path(out)


def _write_json(
    path: Path,
    summary: list[Any],
    venue: Any,
    url: str,
    state_dir: Path,
    speed: float,
    wall_s: float,
    ok: bool,
    extra: dict[str, Any],
) -> None:
    doc = {
        "venue": "Brackenford Science Centre (simulated)",
        "recording": str(venue.directory),
        "duration_s": venue.duration_s,
        "speed": speed,
        "wall_time_s": round(wall_s, 2),
        "collector": url,
        "state_dir": str(state_dir),
        "outcome_as_expected": ok,
        "offset_definition": "collector time minus board monotonic time, seconds, at offset_at_board_s "
        "(the newest clock exchange the collector's fit kept); offset_error_ms = est - true",
        "boards": [s.to_json() for s in summary],
        **extra,
    }
    tmp = path.with_name(path.name + ".part")
    try:
        tmp.write_text(json.dumps(doc, indent=2) + "\n")
        os.replace(tmp, path)
    except OSError as e:
        raise ConfigError(f"--summary-json: {path}: cannot write: {e.strerror or e}") from e
