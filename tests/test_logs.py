"""Every log line is one JSON object, whoever logged it; under systemd each carries its journald priority."""

from __future__ import annotations

import io
import json
import logging
import os
from pathlib import Path

import structlog

from listenpost.core.logs import configure, journal_stream


def _lines(buf: io.StringIO) -> list[str]:
    return [ln for ln in buf.getvalue().splitlines() if ln]


def test_standard_library_records_come_out_as_json_lines_like_structlog_ones():
    buf = io.StringIO()
    configure("json", "info", stream=buf, journal=False, board="g0-a")
    structlog.get_logger("listenpost.agent").info("batch_sent", seq=3)
    logging.getLogger("bleak.backends.bluezdbus.manager").warning("adapter %s vanished", "hci0")
    try:
        raise RuntimeError("loop trouble")
    except RuntimeError:
        logging.getLogger("asyncio").error("Task exception was never retrieved", exc_info=True)
    logging.getLogger("asyncio").debug("below the level: not written")
    lines = _lines(buf)
    assert len(lines) == 3
    entries = [json.loads(ln) for ln in lines]  # each line is one object: no bare text, no stray lines
    ours, bleak, loop = entries
    assert ours["event"] == "batch_sent" and ours["board"] == "g0-a" and ours["level"] == "info"
    assert bleak == {
        "event": "adapter hci0 vanished",
        "board": "g0-a",
        "level": "warning",
        "logger": "bleak.backends.bluezdbus.manager",
        "timestamp": bleak["timestamp"],
    }
    assert loop["level"] == "error" and loop["logger"] == "asyncio"
    assert "RuntimeError: loop trouble" in loop["exception"]


def test_under_journald_each_line_starts_with_its_syslog_priority():
    buf = io.StringIO()
    configure("json", "debug", stream=buf, journal=True)
    log = structlog.get_logger("x")
    log.debug("d")
    log.info("i")
    log.warning("w")
    log.error("e")
    logging.getLogger("bleak").warning("from a library")
    logging.getLogger("asyncio").critical("from the loop")
    # sd-daemon(3): <7> debug, <6> info, <4> warning, <3> error, <2> critical.
    got = [(ln[:3], json.loads(ln[3:])["event"]) for ln in _lines(buf)]
    assert got == [
        ("<7>", "d"),
        ("<6>", "i"),
        ("<4>", "w"),
        ("<3>", "e"),
        ("<4>", "from a library"),
        ("<2>", "from the loop"),
    ]


def test_the_journal_stream_is_recognised_by_device_and_inode(tmp_path: Path, monkeypatch):
    """systemd.exec(5): $JOURNAL_STREAM is "device:inode" of the stream it connected to stderr."""
    with (tmp_path / "out").open("w") as f:
        st = os.fstat(f.fileno())
        monkeypatch.setenv("JOURNAL_STREAM", f"{st.st_dev}:{st.st_ino}")
        assert journal_stream(f)
        configure("json", stream=f)
        structlog.get_logger("x").warning("w")
        f.flush()
        monkeypatch.setenv("JOURNAL_STREAM", f"{st.st_dev}:{st.st_ino + 1}")  # redirected elsewhere
        assert not journal_stream(f)
        configure("json", stream=f)
        structlog.get_logger("x").warning("plain")
        f.flush()
    monkeypatch.delenv("JOURNAL_STREAM")
    assert not journal_stream(io.StringIO())
    first, second = (tmp_path / "out").read_text().splitlines()
    assert first.startswith("<4>{") and second.startswith("{")


def test_configuring_again_replaces_the_handler_instead_of_doubling_lines():
    a, b = io.StringIO(), io.StringIO()
    configure("json", stream=a, journal=False)
    configure("json", stream=b, journal=False)
    logging.getLogger("bleak").warning("once")
    assert a.getvalue() == "" and len(_lines(b)) == 1


def test_a_closed_log_stream_drops_library_records_quietly(capsys):
    buf = io.StringIO()
    configure("json", stream=buf, journal=False)
    buf.close()
    logging.getLogger("asyncio").warning("after the run")
    assert "Logging error" not in capsys.readouterr().err
