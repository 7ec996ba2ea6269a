"""The admin commands through ``listenpost.cli.main`` against a real collector on loopback."""

from __future__ import annotations

import asyncio
import io
import json
import socket
from pathlib import Path

import pytest

from listenpost.cli import main
from listenpost.collector.app import create_app
from listenpost.collector.state import STORE
from listenpost.core.clock import VirtualClock
from listenpost.core.logs import configure
from tests.collector.test_api import TAGS, batch_body, readings, settings_for


@pytest.fixture
async def server(aiohttp_server, tmp_path: Path, clock: VirtualClock):
    # The server shares this process: keep its log lines out of the CLI's captured stdout.
    configure("json", stream=io.StringIO())
    app = create_app(settings_for(tmp_path / "state"), clock=clock, run_monitor=False)
    return await aiohttp_server(app)


async def cli(server, tmp_path: Path, *args: str, state: bool = True) -> int:
    """Run one command in a worker thread (the CLI runs its own event loop) against ``server``."""
    extra = ["--collector", str(server.make_url("")).rstrip("/")]
    if state:
        extra += ["--state-dir", str(tmp_path / "state")]
    group, *rest = args
    # Options go after the innermost subcommand and its positionals.
    return await asyncio.to_thread(main, ["collector", group, *rest, *extra])


async def test_board_add_json_list_show_and_reissue(server, tmp_path, capsys):
    assert (
        await cli(
            server, tmp_path, "board", "add", "g0-a", "--room", "G0 Foyer", "--floor", "ground", "--json"
        )
        == 0
    )
    added = json.loads(capsys.readouterr().out)
    assert added["name"] == "g0-a" and len(added["code"].replace("-", "")) == 16
    assert await cli(server, tmp_path, "board", "add", "g3-a", "--room", "G3 Weather Hall") == 0
    out = capsys.readouterr().out
    assert "enrollment code:" in out and "listenpost agent enroll --collector" in out
    assert await cli(server, tmp_path, "board", "list") == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == ["BOARD", "ROOM", "FLOOR", "ENROLLED", "OFFSET", "dB"]
    assert [ln.split()[0] for ln in lines[2:]] == ["g0-a", "g3-a"]
    # Columns line up: every row starts its ROOM column where the header does.
    col = lines[0].index("ROOM")
    assert all(ln[col - 2 : col] == "  " and ln[col] != " " for ln in lines[2:])
    assert await cli(server, tmp_path, "board", "add", "g0-a", "--room", "G0 Foyer") == 1  # exists: 409
    assert "already exists" in capsys.readouterr().err
    assert await cli(server, tmp_path, "board", "add", "Bad Name", "--room", "x") == 2  # 400: bad input
    assert "name" in capsys.readouterr().err
    assert await cli(server, tmp_path, "board", "reissue", "g0-a", "--json") == 0
    assert json.loads(capsys.readouterr().out)["code"] != added["code"]
    assert await cli(server, tmp_path, "board", "show", "g0-a") == 0
    assert "G0 Foyer" in capsys.readouterr().out
    # An unknown name is a mistake in what was asked: exit 2, and the message says where to look.
    assert await cli(server, tmp_path, "board", "show", "nope") == 2
    err = capsys.readouterr().err
    assert "no board named 'nope'" in err and "board list" in err and "Traceback" not in err


async def test_board_add_with_bundle_writes_cloud_init_files(server, tmp_path, capsys):
    bundle = tmp_path / "card"
    assert (
        await cli(
            server,
            tmp_path,
            "board",
            "add",
            "u1-a",
            "--room",
            "U1 Space Gallery",
            "--bundle",
            str(bundle),
            "--json",
        )
        == 0
    )
    code = json.loads(capsys.readouterr().out)["code"]
    user_data = (bundle / "user-data").read_text()
    assert user_data.startswith("#cloud-config\n") and code in user_data
    assert (bundle / "user-data").stat().st_mode & 0o077 == 0


async def test_tags_import_plain_and_csv_all_or_nothing(server, tmp_path, capsys):
    plain = tmp_path / "tags.txt"
    plain.write_text(
        "# visitor tags\n"
        + "\n".join(TAGS[:3])
        + "\n\n"
        + TAGS[0].upper().replace("IBEACON", "ibeacon")
        + "  # again\n"
    )
    assert await cli(server, tmp_path, "tags", "import", str(plain)) == 0
    assert "3 tags read, 3 new" in capsys.readouterr().out
    table = tmp_path / "tags.csv"
    table.write_text(f"label,id\nfoyer,{TAGS[3]}\nlpx,{TAGS[5]}\n")
    assert await cli(server, tmp_path, "tags", "import", str(table)) == 0
    assert "2 new" in capsys.readouterr().out
    bad = tmp_path / "bad.csv"
    bad.write_text(f"label,id\na,{TAGS[4]}\nb,ibeacon:not-a-uuid:1:2\n")
    assert await cli(server, tmp_path, "tags", "import", str(bad)) == 2
    err = capsys.readouterr().err
    assert f"{bad}:3:" in err
    bad_plain = tmp_path / "bad.txt"
    bad_plain.write_text(TAGS[4] + "\n# ok so far\nmac:zz\n")
    assert await cli(server, tmp_path, "tags", "import", str(bad_plain)) == 2
    assert f"{bad_plain}:3:" in capsys.readouterr().err
    # Nothing of the bad files was stored (TAGS[4] appears only in them).
    assert await cli(server, tmp_path, "tags", "list") == 0
    listed = capsys.readouterr().out.split()
    assert listed == sorted([*TAGS[:4], TAGS[5]])
    assert await cli(server, tmp_path, "tags", "retire", TAGS[0]) == 0
    assert "retired 1 of 1" in capsys.readouterr().out


async def test_status_json_and_table(server, tmp_path, capsys):
    client_app = server.app
    assert await cli(server, tmp_path, "board", "add", "g1-a", "--room", "G1 Light & Optics", "--json") == 0
    code = json.loads(capsys.readouterr().out)["code"]
    import aiohttp

    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as s:
        async with s.post(server.make_url("/v1/enroll"), json={"code": code, "fingerprint": {}}) as r:
            token = (await r.json())["token"]
        async with s.post(
            server.make_url("/v1/batches"),
            json=batch_body("g1-a", 0, readings(25)),
            headers={"Authorization": f"Bearer {token}"},
        ) as r:
            assert r.status == 200
    assert await cli(server, tmp_path, "status", "--json") == 0
    doc = json.loads(capsys.readouterr().out)
    row = doc["boards"][0]
    assert {"name", "room", "state", "readings_total", "clock_skew_ppm", "clock_offset_ms"} <= set(row)
    assert (row["name"], row["room"], row["readings_total"]) == ("g1-a", "G1 Light & Optics", 25)
    assert await cli(server, tmp_path, "status") == 0
    out = capsys.readouterr().out
    assert "1 boards · 25 readings" in out and "g1-a" in out
    assert client_app[STORE] is not None


async def test_export_csv_and_npz(server, tmp_path, clock, capsys):
    import csv

    import numpy as np

    assert await cli(server, tmp_path, "board", "add", "g2-a", "--room", "G2 Sound Lab", "--json") == 0
    code = json.loads(capsys.readouterr().out)["code"]
    import aiohttp

    t_start = clock.time()
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as s:
        async with s.post(server.make_url("/v1/enroll"), json={"code": code, "fingerprint": {}}) as r:
            token = (await r.json())["token"]
        # 20 readings 0.25 s apart, sent at board time 100 s: they span [t2 - 50, t2 - 45.25].
        async with s.post(
            server.make_url("/v1/batches"),
            json=batch_body("g2-a", 0, readings(20), t1=100.0),
            headers={"Authorization": f"Bearer {token}"},
        ) as r:
            assert r.status == 200
    out_csv = tmp_path / "x.csv"
    assert (
        await cli(
            server,
            tmp_path,
            "export",
            "--from",
            str(t_start - 60),
            "--to",
            str(t_start),
            "--bin",
            "10",
            "--format",
            "csv",
            "--out",
            str(out_csv),
        )
        == 0
    )
    rows = list(csv.DictReader(io.StringIO(out_csv.read_text())))
    assert rows and sum(int(r["n"]) for r in rows) == 20
    assert {r["board"] for r in rows} == {"g2-a"}
    out_npz = tmp_path / "x.npz"
    iso_from = (
        __import__("datetime").datetime.fromtimestamp(t_start - 60, __import__("datetime").UTC).isoformat()
    )
    assert (
        await cli(
            server,
            tmp_path,
            "export",
            "--from",
            iso_from,
            "--to",
            str(t_start),
            "--bin",
            "10",
            "--format",
            "npz",
            "--out",
            str(out_npz),
        )
        == 0
    )
    with np.load(out_npz, allow_pickle=False) as z:
        assert int(np.sum(z["counts"])) == 20
    assert (
        await cli(
            server,
            tmp_path,
            "export",
            "--from",
            "yesterday",
            "--to",
            "1",
            "--bin",
            "1",
            "--out",
            str(out_csv),
        )
        == 2
    )


async def test_unreachable_collector_and_bad_token(server, tmp_path, capsys, monkeypatch):
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]  # closed again: nothing listens there
    state = tmp_path / "state"
    rc = await asyncio.to_thread(
        main,
        [
            "collector",
            "board",
            "list",
            "--collector",
            f"http://127.0.0.1:{port}",
            "--state-dir",
            str(state),
            "--timeout",
            "5",
        ],
    )
    assert rc == 1
    assert "cannot reach the collector" in capsys.readouterr().err
    monkeypatch.setenv("LISTENPOST_ADMIN_TOKEN", "wrong-token")
    assert await cli(server, tmp_path, "board", "list", state=False) == 1
    assert "refused the admin token" in capsys.readouterr().err
    monkeypatch.setenv("LISTENPOST_ADMIN_TOKEN", (state / "admin-token").read_text().strip())
    assert await cli(server, tmp_path, "board", "list", state=False) == 0
    assert (state / "admin-token").stat().st_mode & 0o777 == 0o600


async def test_events_listing(server, tmp_path, capsys):
    assert await cli(server, tmp_path, "board", "add", "g5-a", "--room", "G5 Shop") == 0
    assert await cli(server, tmp_path, "board", "retire", "g5-a") == 0
    capsys.readouterr()
    assert await cli(server, tmp_path, "events", "--json") == 0
    evs = json.loads(capsys.readouterr().out)["events"]
    assert [(e["board"], e["kind"]) for e in evs] == [("g5-a", "retired")]
    assert await cli(server, tmp_path, "events", "--since", str(evs[0]["id"]), "--json") == 0
    assert json.loads(capsys.readouterr().out)["events"] == []


async def _enroll_and_send(server, body_for, code: str) -> str:
    import aiohttp

    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as s:
        async with s.post(
            server.make_url("/v1/enroll"), json={"code": code, "fingerprint": {"machine_id": "a"}}
        ) as r:
            token = (await r.json())["token"]
        for body in body_for:
            async with s.post(
                server.make_url("/v1/batches"), json=body, headers={"Authorization": f"Bearer {token}"}
            ) as r:
                assert r.status == 200, await r.text()
    return token


async def test_calibrate_from_a_reference_tag(server, tmp_path, capsys):
    from listenpost.core.records import Reading

    ref = TAGS[0]
    assert await cli(server, tmp_path, "board", "add", "g0-b", "--room", "G0 Foyer", "--json") == 0
    code = json.loads(capsys.readouterr().out)["code"]
    # 40 readings at -74.0 dBm, 0.5 s apart, just before the send time.
    rs = [Reading(ref, round((60 + i * 0.5) * 1e9), -74.0) for i in range(40)]
    await _enroll_and_send(server, [batch_body("g0-b", 0, rs, t1=81.0)], code)
    assert (
        await cli(
            server,
            tmp_path,
            "calibrate",
            "g0-b",
            "--tag",
            ref,
            "--distance",
            "4",
            "--power-1m",
            "-59",
            "--exponent",
            "2",
            "--json",
        )
        == 0
    )
    cal = json.loads(capsys.readouterr().out)
    # docs/references.md §7 worked example (Rappaport log-distance model): P1 = -59 dBm, n = 2, d = 4 m gives
    # RSSI(4 m) = -71.0412 dBm; a board that hears -74.0 there needs +2.9588 dB added.
    assert cal["offset_db"] == pytest.approx(-71.0412 - (-74.0), abs=1e-3)
    assert cal["samples"] == 40 and cal["spread_db"] == 0
    assert await cli(server, tmp_path, "board", "show", "g0-b", "--json") == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["offset_db"] == pytest.approx(2.9588, abs=1e-3) and len(shown["calibrations"]) == 1
    assert shown["recalibrate"] is False
    assert (
        await cli(server, tmp_path, "calibrate", "g0-b", "--tag", TAGS[1], "--distance", "4") == 1
    )  # no readings


async def test_walktest_report_per_room(server, tmp_path, clock, capsys):
    from listenpost.core.records import Reading

    ref = TAGS[1]
    codes = {}
    for name, room in (("g1-a", "G1 Light & Optics"), ("g2-a", "G2 Sound Lab")):
        assert await cli(server, tmp_path, "board", "add", name, "--room", room, "--json") == 0
        codes[name] = json.loads(capsys.readouterr().out)["code"]
    # Board time = collector time − (t2 − t1); with t1 = 200 the readings at board 100..160 s are at
    # collector t2 − 100 .. t2 − 40: the first half in G1, the second half in G2.
    t2 = clock.time()
    strong_first = [Reading(ref, round((100 + i) * 1e9), -55.0 if i < 30 else -80.0) for i in range(60)]
    strong_second = [Reading(ref, round((100 + i) * 1e9), -82.0 if i < 30 else -58.0) for i in range(60)]
    await _enroll_and_send(server, [batch_body("g1-a", 0, strong_first, t1=200.0)], codes["g1-a"])
    await _enroll_and_send(server, [batch_body("g2-a", 0, strong_second, t1=200.0)], codes["g2-a"])
    marks = tmp_path / "marks.csv"
    marks.write_text(
        f"room,from,to\nG1 Light & Optics,{t2 - 100},{t2 - 70}\nG2 Sound Lab,{t2 - 70},{t2 - 40}\n"
    )
    assert await cli(server, tmp_path, "walktest", "--tag", ref, "--marks", str(marks), "--json") == 0
    report = json.loads(capsys.readouterr().out)["rooms"]
    assert [(r["room"], r["strongest"]["board"], r["margin_db"]) for r in report] == [
        ("G1 Light & Optics", "g1-a", 27.0),
        ("G2 Sound Lab", "g2-a", 22.0),
    ]
    assert await cli(server, tmp_path, "walktest", "--tag", ref, "--marks", str(marks)) == 0
    assert "G2 Sound Lab" in capsys.readouterr().out
    marks.write_text("room,from\nG1,1\n")
    assert await cli(server, tmp_path, "walktest", "--tag", ref, "--marks", str(marks)) == 2
    assert f"{marks}:1:" in capsys.readouterr().err


@pytest.mark.parametrize(
    "url", ["htp://127.0.0.1:8470", "127.0.0.1:8470", "http://", "http://127.0.0.1:99999"]
)
async def test_a_malformed_collector_url_is_a_usage_error_naming_the_option(tmp_path, capsys, url):
    """A mistyped --collector gets exit 2 and a message naming the option and the value, never a traceback."""
    rc = await asyncio.to_thread(
        main, ["collector", "status", "--collector", url, "--state-dir", str(tmp_path)]
    )
    err = capsys.readouterr().err
    assert rc == 2, err
    assert "--collector" in err and "Traceback" not in err


async def test_a_missing_admin_token_says_where_to_find_it(server, tmp_path, capsys):
    """Pointing --state-dir at the wrong place names the file and both ways to give the token."""
    empty = tmp_path / "elsewhere"
    empty.mkdir()
    rc = await asyncio.to_thread(
        main,
        ["collector", "board", "list", "--collector", str(server.make_url("")), "--state-dir", str(empty)],
    )
    err = capsys.readouterr().err
    assert rc == 2
    assert f"{empty}/admin-token" in err and "--state-dir" in err and "LISTENPOST_ADMIN_TOKEN" in err


async def test_a_url_that_is_not_a_collector_says_so(aiohttp_server, tmp_path, capsys):
    """A plain 404 (another service, or a path after the port) is a runtime failure that names the URL."""
    from aiohttp import web

    async def hello(request: web.Request) -> web.Response:
        return web.Response(text="hello")

    app = web.Application()
    app.router.add_get("/", hello)
    other = await aiohttp_server(app)
    (tmp_path / "admin-token").write_text("x" * 32 + "\n")
    base = str(other.make_url("")).rstrip("/")
    rc = await asyncio.to_thread(
        main, ["collector", "board", "list", "--collector", base, "--state-dir", str(tmp_path)]
    )
    err = capsys.readouterr().err
    assert rc == 1
    assert "answered 404" in err and f"is {base} a listenpost collector" in err


async def test_a_path_after_the_port_is_named(server, tmp_path, capsys):
    """The collector's own 404 for an unknown route gets the same explanation, not a bare 'Not Found'."""
    base = str(server.make_url("")).rstrip("/") + "/v1"
    rc = await asyncio.to_thread(
        main, ["collector", "status", "--collector", base, "--state-dir", str(tmp_path / "state")]
    )
    err = capsys.readouterr().err
    assert rc == 1 and "no path after the port" in err


async def test_tags_without_a_configured_rule_are_flagged_at_import(aiohttp_server, tmp_path, clock, capsys):
    """Custom-firmware tags are stored either way, but without the rule in collector.yaml the import warns."""
    configure("json", stream=io.StringIO())
    bare = create_app(settings_for(tmp_path / "bare", decode={"rules": []}), clock=clock, run_monitor=False)
    servers = {"bare": await aiohttp_server(bare)}
    tags = tmp_path / "tags.txt"
    tags.write_text(f"{TAGS[0]}\nlpx:00000001\nlpx:00000002\n")
    rc = await asyncio.to_thread(
        main,
        [
            "collector",
            "tags",
            "import",
            str(tags),
            "--collector",
            str(servers["bare"].make_url("")),
            "--state-dir",
            str(tmp_path / "bare"),
        ],
    )
    out = capsys.readouterr().out
    assert rc == 0
    assert "3 tags read" in out and "2 tags use the decode rule 'lpx'" in out and "decode.rules" in out


async def test_tags_with_their_rule_configured_import_quietly(server, tmp_path, capsys):
    tags = tmp_path / "tags.txt"
    tags.write_text(f"{TAGS[0]}\nlpx:00000001\n")
    assert await cli(server, tmp_path, "tags", "import", str(tags)) == 0
    assert "decode rule" not in capsys.readouterr().out


async def test_board_add_warns_when_boards_would_be_sent_to_loopback(
    server, aiohttp_server, tmp_path, clock, capsys
):
    """A code or bundle pointing boards at 127.0.0.1 cannot work on a board: say so, and say what to set."""
    assert await cli(server, tmp_path, "board", "add", "g0-a", "--room", "G0 Foyer") == 0
    captured = capsys.readouterr()
    assert "loopback" in captured.err and "public_url" in captured.err
    assert "enrollment code:" in captured.out

    configure("json", stream=io.StringIO())
    public = create_app(
        settings_for(tmp_path / "pub", public_url="http://10.20.0.2:8470"), clock=clock, run_monitor=False
    )
    srv = await aiohttp_server(public)
    bundle = tmp_path / "card"
    rc = await asyncio.to_thread(
        main,
        [
            "collector",
            "board",
            "add",
            "g0-b",
            "--room",
            "G0 Foyer",
            "--bundle",
            str(bundle),
            "--collector",
            str(srv.make_url("")),
            "--state-dir",
            str(tmp_path / "pub"),
        ],
    )
    captured = capsys.readouterr()
    assert rc == 0 and "loopback" not in captured.err
    assert "--collector http://10.20.0.2:8470 --code" in captured.out
    assert "http://10.20.0.2:8470" in (bundle / "user-data").read_text()


async def test_a_spaced_package_is_refused_before_a_code_is_issued(server, tmp_path, capsys):
    rc = await cli(
        server,
        tmp_path,
        "board",
        "add",
        "g0-a",
        "--room",
        "G0 Foyer",
        "--bundle",
        str(tmp_path / "card"),
        "--package",
        "listenpost --pre",
    )
    assert rc == 2 and "--package" in capsys.readouterr().err
    assert await cli(server, tmp_path, "board", "list", "--json") == 0
    assert json.loads(capsys.readouterr().out)["boards"] == []


async def test_events_read_as_sentences_and_an_unknown_board_is_named(server, tmp_path, capsys):
    from listenpost.collector.cli import event_detail

    assert (
        event_detail("state_changed", {"old": "live", "new": "late", "reason": "no contact for 32 s"})
        == "live → late: no contact for 32 s"
    )
    assert (
        event_detail("state_changed", {"old": None, "new": "silent", "reason": "no contact yet"})
        == "– → silent: no contact yet"
    )
    assert event_detail("calibrated", {"offset_db": 2.5, "warnings": []}) == "offset_db=2.5 warnings=[]"
    assert await cli(server, tmp_path, "events", "--board", "nope") == 2
    assert "no board named 'nope'" in capsys.readouterr().err


async def test_calibration_warnings_say_what_to_do(server, tmp_path, capsys):
    """A calibration far off (wrong distance) is applied but explained in words, with the next step."""
    from listenpost.core.records import Reading

    ref = TAGS[0]
    assert await cli(server, tmp_path, "board", "add", "g0-b", "--room", "G0 Foyer", "--json") == 0
    code = json.loads(capsys.readouterr().out)["code"]
    rs = [Reading(ref, round((60 + i * 0.5) * 1e9), -95.0) for i in range(40)]
    await _enroll_and_send(server, [batch_body("g0-b", 0, rs, t1=81.0)], code)
    assert await cli(server, tmp_path, "calibrate", "g0-b", "--tag", ref, "--distance", "1") == 0
    out = capsys.readouterr().out
    # -59 - (-95) = +36 dB: far past the 15 dB the collector accepts without a warning.
    assert "offset +36.0 dB" in out and "raw median -95.0 dBm" in out
    assert "wrong --distance" in out and "offset_large" not in out and "calibrate again" in out


async def test_walktest_room_nobody_heard_is_not_called_wrong(server, tmp_path, clock, capsys):
    """A room where no board heard the tag reads 'nobody' with no verdict, not 'NO' (which means: wrong room)."""
    assert await cli(server, tmp_path, "board", "add", "g1-a", "--room", "G1 Light & Optics") == 0
    marks = tmp_path / "marks.csv"
    marks.write_text(f"room,from,to\nG1 Light & Optics,{clock.time() - 60},{clock.time() - 30}\n")
    capsys.readouterr()
    assert await cli(server, tmp_path, "walktest", "--tag", TAGS[1], "--marks", str(marks)) == 0
    row = capsys.readouterr().out.splitlines()[2]
    assert "nobody" in row and "NO" not in row.split()


@pytest.mark.parametrize(
    ("option", "value"),
    [("--room", "G0 Foyer\nbootcmd: [[touch, /pwned]]\n#"), ("--room", "G0\x1b[2J"), ("--floor", "up\rper")],
)
async def test_a_control_character_in_a_name_is_refused_naming_the_option(
    server, tmp_path, capsys, option, value
):
    args = ["board", "add", "g0-a", "--room", "G0 Foyer", "--bundle", str(tmp_path / "card")]
    rc = await cli(server, tmp_path, *args, option, value)
    err = capsys.readouterr().err
    assert rc == 2 and f"{option}: must not contain control characters" in err and "Traceback" not in err
    assert not (tmp_path / "card").exists()
    assert await cli(server, tmp_path, "board", "list", "--json") == 0
    assert json.loads(capsys.readouterr().out)["boards"] == []  # the collector was never asked


async def test_a_walk_test_room_with_a_control_character_names_the_line(server, tmp_path, capsys):
    marks = tmp_path / "marks.csv"
    marks.write_text('room,from,to\n"G0\nbootcmd",1700000000,1700000060\n')
    rc = await cli(server, tmp_path, "walktest", "--tag", "lpx:00000007", "--marks", str(marks))
    err = capsys.readouterr().err
    assert rc == 2 and f"{marks}:3: room: must not contain control characters" in err


async def test_a_bundle_folder_of_another_board_is_refused_unless_forced(server, tmp_path, capsys):
    card = tmp_path / "card"
    args = ("--room", "G0 Foyer", "--bundle", str(card), "--json")
    assert await cli(server, tmp_path, "board", "add", "g0-a", *args) == 0
    first = (card / "user-data").read_text()
    capsys.readouterr()
    # Another board into the same folder: refused before a code is issued, the card left as it was.
    assert await cli(server, tmp_path, "board", "add", "g0-b", *args) == 2
    err = capsys.readouterr().err
    assert "--bundle" in err and "g0-a" in err and "--force" in err and "Traceback" not in err
    assert (card / "user-data").read_text() == first
    assert await cli(server, tmp_path, "board", "list", "--json") == 0
    assert [b["name"] for b in json.loads(capsys.readouterr().out)["boards"]] == ["g0-a"]
    # The same board's own bundle may be rewritten (a reissue after a re-flash).
    assert await cli(server, tmp_path, "board", "reissue", "g0-a", "--bundle", str(card), "--json") == 0
    capsys.readouterr()
    assert await cli(server, tmp_path, "board", "add", "g0-b", *args, "--force") == 0
    assert "g0-b" in (card / "meta-data").read_text()


async def test_events_into_a_closed_pipe_ends_quietly(server, tmp_path):
    """``collector events | head -1``: the reader goes away; no traceback, the pipe's exit status."""
    import os
    import subprocess
    import sys

    for name in ("g5-a", "g5-b"):
        assert await cli(server, tmp_path, "board", "add", name, "--room", "G5 Shop") == 0
        assert await cli(server, tmp_path, "board", "retire", name) == 0
    read, write = os.pipe()
    os.close(read)  # every write to the pipe now fails with EPIPE, as after `head` exits
    try:
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            "-m",
            "listenpost",
            "collector",
            "events",
            "--collector",
            str(server.make_url("")).rstrip("/"),
            "--state-dir",
            str(tmp_path / "state"),
            stdout=write,
            stderr=subprocess.PIPE,
        )
    finally:
        os.close(write)
    _, err = await asyncio.wait_for(proc.communicate(), 60)
    assert b"Traceback" not in err and b"BrokenPipe" not in err, err.decode()
    assert proc.returncode == 141  # 128 + SIGPIPE, what a shell reports for a writer cut off by head


async def test_board_add_writes_a_wifi_network_config_with_the_passphrase_from_a_file(
    server, tmp_path, capsys
):
    import yaml

    secret = tmp_path / "wifi.txt"
    secret.write_text("tall-lighthouse-17\n")
    card = tmp_path / "card"
    wifi = ["--wifi-ssid", "Brackenford Staff", "--wifi-country", "GB", "--bundle", str(card)]
    rc = await cli(
        server, tmp_path, "board", "add", "g2-a", "--room", "G2", *wifi, "--wifi-passphrase-file", str(secret)
    )
    assert rc == 0
    net = yaml.safe_load((card / "network-config").read_text())["network"]
    assert net["wifis"]["wlan0"]["access-points"] == {"Brackenford Staff": {"password": "tall-lighthouse-17"}}
    capsys.readouterr()
    # No option takes the passphrase itself, not even as an abbreviation of the file option.
    with pytest.raises(SystemExit) as e:
        await cli(
            server, tmp_path, "board", "add", "g2-b", "--room", "G2", *wifi, "--wifi-passphrase", "hunter22"
        )
    assert e.value.code == 2 and "unrecognized arguments: --wifi-passphrase" in capsys.readouterr().err
    # A passphrase too short for WPA is refused before any code is issued.
    secret.write_text("short\n")
    rc = await cli(
        server,
        tmp_path,
        "board",
        "add",
        "g2-c",
        "--room",
        "G2",
        *wifi[:-1],
        str(tmp_path / "c2"),
        "--wifi-passphrase-file",
        str(secret),
    )
    assert rc == 2 and "--wifi-passphrase-file" in capsys.readouterr().err
    assert await cli(server, tmp_path, "board", "list", "--json") == 0
    assert [b["name"] for b in json.loads(capsys.readouterr().out)["boards"]] == ["g2-a"]
