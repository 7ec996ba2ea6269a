"""
``listenpost collector ...``: ``serve`` runs the service; every other command is a thin client of the
admin API over HTTP (``--collector URL``; admin token from ``--state-dir`` or ``$LISTENPOST_ADMIN_TOKEN``).

Exit codes: 0 ok · 1 the collector is unreachable, refused the token, or failed · 2 bad usage or input ·
3 `export` matched no readings (nothing written).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import csv
import io
import json
import os
import sys
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from listenpost.core.errors import ConfigError, DecodeError, ListenpostError

if TYPE_CHECKING:
    import ssl

DEFAULT_URL = "http://127.0.0.1:8470"
DEFAULT_STATE_DIR = "/var/lib/listenpost/collector"
DEFAULT_TIMEOUT = 30.0
JSON_HELP = "print JSON instead of text"
PACKAGE_HELP = (
    "what the card's first boot pip-installs as the agent (a requirement, wheel URL or path "
    "reachable from the board; default: listenpost==<this version> from the collector's wheelhouse, "
    "see 'collector wheelhouse build')"
)
FORCE_HELP = "write the bundle even into a folder that holds another board's bundle"


class AdminError(ListenpostError):
    """The collector could not be reached, refused the request, or failed."""


# ------------------------------------------------------------------ parser


def register(sub: argparse._SubParsersAction, name: str, help_text: str) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(name, help=help_text, description=help_text)
    cmds = p.add_subparsers(
        dest="command",
        required=True,
        metavar="{serve,board,tags,plan,status,export,report,calibrate,walktest,events}",
    )

    sv = cmds.add_parser(
        "serve",
        help="run the collector service",
        description="Run the collector: board API, admin API, health page, /metrics.",
    )
    sv.add_argument(
        "--state-dir",
        required=True,
        type=Path,
        metavar="DIR",
        help="admin token and (unless --db) the SQLite database live here",
    )
    sv.add_argument(
        "--db",
        metavar="URL",
        help="postgresql://... for several collectors on one database (default: the systemd credential "
        "db_url, else $LISTENPOST_DB_URL, else database.url of the config, else SQLite in --state-dir)",
    )
    sv.add_argument("--host", help="listen address (default from the config, else 127.0.0.1)")
    sv.add_argument("--port", type=int, help="listen port (default from the config, else 8470)")
    sv.add_argument("--config", type=Path, metavar="FILE", help="collector.yaml")
    sv.add_argument(
        "--log-format",
        choices=("auto", "json", "console"),
        default="auto",
        help="log lines as JSON or for a terminal (default: console on a terminal, else JSON)",
    )
    sv.set_defaults(func=_serve)

    def client(parser: argparse.ArgumentParser) -> argparse.ArgumentParser:
        parser.add_argument(
            "--collector",
            metavar="URL",
            default=os.environ.get("LISTENPOST_COLLECTOR", DEFAULT_URL),
            help="collector base URL (default $LISTENPOST_COLLECTOR or %(default)s)",
        )
        parser.add_argument(
            "--state-dir",
            type=Path,
            metavar="DIR",
            help=f"read the admin token from DIR/admin-token (default: $LISTENPOST_ADMIN_TOKEN, "
            f"else {DEFAULT_STATE_DIR})",
        )
        parser.add_argument(
            "--timeout",
            type=float,
            default=DEFAULT_TIMEOUT,
            metavar="S",
            help="give up on a request after S seconds (default %(default)s)",
        )
        return parser

    board = cmds.add_parser(
        "board",
        help="add, list, show, retire boards; reissue enrollment codes",
        description="Add, list, show and retire boards; reissue enrollment codes.",
    )
    bc = board.add_subparsers(dest="board_command", required=True, metavar="{add,list,show,retire,reissue}")
    add = client(
        bc.add_parser(
            "add",
            allow_abbrev=False,  # so --wifi-passphrase SECRET is refused, not read as a file name
            help="register a board and print its one-time enrollment code",
            description="Register a board and print its one-time enrollment code. Boards reach the collector at "
            "public_url of collector.yaml, else at --collector: give one the board can reach.",
        )
    )
    add.add_argument(
        "name", metavar="NAME", help="board name: lower-case letters, digits, '.', '_', '-' (e.g. g0-a)"
    )
    add.add_argument("--room", required=True, help="the room the board hears, as walk-test marks name it")
    add.add_argument("--floor", help="floor label (free text)")
    add.add_argument(
        "--bundle",
        type=Path,
        metavar="DIR",
        help="also write a provisioning bundle (agent.yaml, cloud-init user-data/meta-data) to DIR",
    )
    add.add_argument("--package", metavar="SPEC", help=PACKAGE_HELP)
    add.add_argument("--force", action="store_true", help=FORCE_HELP)
    network_options(add)
    add.add_argument("--json", action="store_true", help="print JSON instead of text")
    add.set_defaults(func=_board_add)
    ls = client(
        bc.add_parser("list", help="all boards", description="All boards: room, floor, enrolled, offset.")
    )
    ls.add_argument("--json", action="store_true", help=JSON_HELP)
    ls.set_defaults(func=_board_list)
    show = client(
        bc.add_parser(
            "show",
            help="one board: record, state, counts, calibration history",
            description="One board: record, state, counts, calibration history.",
        )
    )
    show.add_argument("name", metavar="NAME", help="board name")
    show.add_argument("--json", action="store_true", help=JSON_HELP)
    show.set_defaults(func=_board_show)
    ret = client(
        bc.add_parser(
            "retire",
            help="retire a board: its token stops working",
            description="Retire a board: its token stops working; its readings stay.",
        )
    )
    ret.add_argument("name", metavar="NAME", help="board name")
    ret.set_defaults(func=_board_retire)
    rei = client(
        bc.add_parser(
            "reissue",
            allow_abbrev=False,  # so --wifi-passphrase SECRET is refused, not read as a file name
            help="new enrollment code for a re-flashed card (older codes stop working)",
            description="New one-time enrollment code for a re-flashed card; older codes stop working.",
        )
    )
    rei.add_argument("name", metavar="NAME", help="board name")
    rei.add_argument("--bundle", type=Path, metavar="DIR", help="also write a provisioning bundle to DIR")
    rei.add_argument("--package", metavar="SPEC", help=PACKAGE_HELP)
    rei.add_argument("--force", action="store_true", help=FORCE_HELP)
    network_options(rei)
    rei.add_argument("--json", action="store_true", help=JSON_HELP)
    rei.set_defaults(func=_board_reissue)

    tags = cmds.add_parser(
        "tags",
        help="import, list, retire registered tags",
        description="Import, list and retire registered tags (canonical IDs, README.md 'Tag identities').",
    )
    tc = tags.add_subparsers(dest="tags_command", required=True, metavar="{import,list,retire}")
    imp = client(
        tc.add_parser(
            "import",
            help="register tags from a file (all or nothing)",
            description="FILE: one canonical ID per line with '#' comments, or CSV with an "
            "'id' column. A bad line stops the import; nothing is stored.",
        )
    )
    imp.add_argument("file", type=Path, metavar="FILE", help="tag file or CSV")
    imp.set_defaults(func=_tags_import)
    tl = client(
        tc.add_parser(
            "list",
            help="registered tags, one per line",
            description="Registered tags, one canonical ID per line.",
        )
    )
    tl.add_argument("--retired", action="store_true", help="include retired tags")
    tl.set_defaults(func=_tags_list)
    tr = client(
        tc.add_parser(
            "retire",
            help="retire tags (boards stop reporting them)",
            description="Retire tags: boards stop reporting them; stored readings stay.",
        )
    )
    tr.add_argument("ids", nargs="+", metavar="ID", help="canonical tag ID")
    tr.set_defaults(func=_tags_retire)

    st = client(
        cmds.add_parser(
            "status",
            help="fleet health: one line per board, then what needs a person",
            description="Fleet health, one line per board (state and the health page's figures, "
            "under the same names), then the boards that need a person, most urgent first, each "
            "with the reason, what to check on site and which command to run. Needs no admin token.",
        )
    )
    st.add_argument("--json", action="store_true", help=JSON_HELP)
    st.set_defaults(func=_status)

    plan = cmds.add_parser(
        "plan",
        help="import the venue plan (floors, rooms, board and reference tag positions)",
        description="The venue plan the plan view draws and calibration reads (docs/technician.md).",
    )
    pc = plan.add_subparsers(dest="plan_command", required=True, metavar="{import}")
    pi = client(
        pc.add_parser(
            "import",
            help="check a plan file and make it the collector's plan",
            description="FILE: the venue plan as YAML or JSON. It is checked here and again by the "
            "collector; any problem is named by its key path and nothing is kept.",
        )
    )
    pi.add_argument("file", type=Path, metavar="FILE", help="venue plan (YAML)")
    pi.set_defaults(func=_plan_import)

    ex = client(
        cmds.add_parser(
            "export",
            help="binned RSSI table (tag × time bin × board) with a chosen calibration",
            description="RSSI per tag, time bin and board, on the collector's clock (each board's clock "
            "correction applied); the strongest reading of each bin. Bins are aligned to the Unix epoch "
            "(starts are multiples of --bin; the first and last may be partial). CSV and Parquet: one row "
            "per heard cell (t_start_iso, t_start, tag, board, room, floor, rssi_dbm, n). npz: dense float32 "
            "arrays rssi[tag, bin, board] (NaN where not heard), counts, tags, boards, rooms, floors, "
            "bin_starts, metadata. See docs/export.md.",
        )
    )
    ex.add_argument(
        "--from", dest="t_from", required=True, metavar="T", help="ISO-8601 (UTC if no zone) or Unix seconds"
    )
    ex.add_argument(
        "--to", dest="t_to", required=True, metavar="T", help="end, same forms; must be after --from"
    )
    ex.add_argument("--bin", type=float, required=True, metavar="S", help="bin width, seconds")
    ex.add_argument("--format", choices=("csv", "npz", "parquet"), default="csv", help="default %(default)s")
    ex.add_argument(
        "--calibration",
        choices=("applied", "history", "latest"),
        default="applied",
        help="offset added to the raw RSSI: as each board applied it, the calibration history valid at "
        "each reading's time, or each board's latest calibration for all readings (default %(default)s)",
    )
    ex.add_argument("--out", type=Path, required=True, metavar="FILE", help="written whole or not at all")
    ex.add_argument("--board", action="append", metavar="NAME", help="only these boards (repeatable)")
    ex.add_argument("--tag", action="append", metavar="ID", help="only these tags (repeatable)")
    ex.epilog = (
        "The export runs as a job on the collector; this command waits for it as long as it runs "
        "(--timeout bounds each request, not the whole export) and shows progress on a terminal. "
        f"Exit status {EXIT_NO_READINGS}: no reading matched, nothing written."
    )
    ex.set_defaults(func=_export)

    rp = client(
        cmds.add_parser(
            "report",
            help="study-day report: one self-contained HTML file with plots",
            description="One HTML file (plots inline, no external requests; prints on A4, reads on a phone) "
            "of the span: board states per floor, readings per room per hour, coverage gaps, losses and "
            "their cause, clock fit per board, calibrations, and a walk test when --walk-tag and "
            "--walk-marks are given. Gathered over the admin API and drawn here, so the collector only "
            "answers queries and runs one export job.",
        )
    )
    rp.add_argument(
        "--from", dest="t_from", required=True, metavar="T", help="ISO-8601 (UTC if no zone) or Unix seconds"
    )
    rp.add_argument(
        "--to", dest="t_to", required=True, metavar="T", help="end, same forms; must be after --from"
    )
    rp.add_argument("--out", type=Path, required=True, metavar="FILE", help="the HTML file, written whole")
    rp.add_argument("--walk-tag", metavar="ID", help="reference tag of a walk test to include")
    rp.add_argument("--walk-marks", type=Path, metavar="FILE", help="its marks: CSV room,from,to")
    rp.set_defaults(func=_report)

    cal = client(
        cmds.add_parser(
            "calibrate",
            help="set a board's RSSI offset from a reference tag at a measured distance",
            description="Set a board's RSSI offset from the readings of a reference tag at a measured distance "
            "over the last few minutes: the median, corrected to 1 m with the log-distance model, "
            "against the tag's power at 1 m. The offset is applied at once and kept in the board's "
            "history; calibrate again to replace it.",
        )
    )
    cal.add_argument("name", metavar="NAME", nargs="?", help="board name (not with --fleet)")
    cal.add_argument("--tag", metavar="ID", help="the reference tag's canonical ID")
    cal.add_argument("--distance", type=float, metavar="M", help="tag-to-board distance, metres")
    cal.add_argument(
        "--fleet",
        action="store_true",
        help="every board at once from the venue plan's reference tags (docs/calibration.md); "
        "prints the fit, and applies it with --apply",
    )
    cal.add_argument("--apply", action="store_true", help="with --fleet: make the fitted offsets current")
    cal.add_argument(
        "--wall-db", type=float, metavar="DB", help="with --fleet: hold the loss per wall (default: fitted)"
    )
    cal.add_argument(
        "--floor-db",
        type=float,
        metavar="DB",
        help="with --fleet: hold the loss per floor slab (default: fitted)",
    )
    cal.add_argument(
        "--minutes",
        type=float,
        metavar="N",
        help="use the last N minutes (default 5; with --fleet 30)",
    )
    cal.add_argument(
        "--power-1m",
        type=float,
        default=-59.0,
        metavar="DBM",
        help="the reference tag's RSSI at 1 m, dBm (default -59)",
    )
    cal.add_argument(
        "--exponent", type=float, default=2.0, metavar="N", help="path-loss exponent (default 2)"
    )
    cal.add_argument("--json", action="store_true", help=JSON_HELP)
    cal.set_defaults(func=_calibrate)

    wt = client(
        cmds.add_parser(
            "walktest",
            help="per-room report of a walk with a reference tag",
            description="Per room visited with a reference tag: which board heard it "
            "strongest, by how many dB, and which boards of other rooms heard "
            "it too. MARKS: CSV with columns room,from,to (times ISO-8601 or "
            "Unix seconds; rooms named as in 'board add --room'), one row per "
            "room visited.",
        )
    )
    wt.add_argument("--tag", required=True, metavar="ID", help="the reference tag's canonical ID")
    wt.add_argument("--marks", required=True, type=Path, metavar="FILE", help="CSV room,from,to")
    wt.add_argument("--json", action="store_true", help=JSON_HELP)
    wt.set_defaults(func=_walktest)

    ev = client(
        cmds.add_parser(
            "events",
            help="state changes, losses, conflicts, calibrations",
            description="Stored events, oldest first: state changes, losses, conflicts, calibrations.",
        )
    )
    ev.add_argument("--since", type=int, default=0, metavar="ID", help="only events after this id")
    ev.add_argument("--board", metavar="NAME", help="only this board's events")
    ev.add_argument("--json", action="store_true", help=JSON_HELP)
    ev.set_defaults(func=_events)

    wh = cmds.add_parser(
        "wheelhouse",
        help="build the wheels boards install the agent from (no internet needed at the venue)",
        description="The agent and its dependencies as wheels for the boards' platform, served by the "
        "collector under /wheels/; bundles install from there by default.",
    )
    whc = wh.add_subparsers(dest="wheelhouse_command", required=True, metavar="{build}")
    whb = whc.add_parser(
        "build",
        help="pip download the agent's wheels for the boards' platform",
        description="Fill STATE_DIR/wheels with listenpost's wheel and a wheel of every agent "
        "dependency for the boards' platform (pip download --only-binary=:all:); replaced whole, "
        "so a failed build keeps the previous wheelhouse.",
    )
    whb.add_argument(
        "--state-dir",
        type=Path,
        default=Path(DEFAULT_STATE_DIR),
        metavar="DIR",
        help="the collector's state directory (default %(default)s)",
    )
    whb.add_argument(
        "--platform",
        action="append",
        metavar="TAG",
        help="the boards' platform tag, repeatable (default: the manylinux tags of a 64-bit "
        "board on Debian 12, manylinux2014_aarch64 and manylinux_2_17_aarch64 to manylinux_2_36_aarch64)",
    )
    whb.add_argument(
        "--python-version", default="3.11", metavar="X.Y", help="the boards' Python (default %(default)s)"
    )
    whb.add_argument(
        "--wheel",
        type=Path,
        metavar="FILE",
        help="listenpost wheel to include (default: built from this checkout, else this version's)",
    )
    whb.set_defaults(func=_wheelhouse_build)


# ------------------------------------------------------------------ serve


def network_options(parser: argparse.ArgumentParser) -> None:
    """The bundle's network-config: Wi-Fi when --wifi-ssid is given, else wired DHCP."""
    parser.add_argument(
        "--wifi-ssid", metavar="SSID", help="the bundle joins this Wi-Fi network (default: wired)"
    )
    parser.add_argument(
        "--wifi-passphrase-file",
        type=Path,
        metavar="FILE",
        help="the Wi-Fi passphrase, one line (read from a file so it stays out of shell history and ps)",
    )
    parser.add_argument("--wifi-country", metavar="CC", help="Wi-Fi regulatory domain, e.g. GB (ISO 3166)")


def _network(args: argparse.Namespace) -> Any:
    from listenpost.collector.provision import Network, check_network, read_passphrase

    path = getattr(args, "wifi_passphrase_file", None)
    return check_network(
        Network(
            wifi_ssid=getattr(args, "wifi_ssid", None),
            wifi_passphrase=read_passphrase(path) if path is not None else None,
            wifi_country=getattr(args, "wifi_country", None),
        )
    )


def tls_context(settings: Any) -> ssl.SSLContext | None:
    """
    The server-side TLS context for ``tls.cert``/``tls.key`` of collector.yaml, or None for plain HTTP.

    Raises:
        ConfigError: a file is missing or unreadable, or the key does not match the certificate.
    """
    import ssl

    if not settings.tls_cert:
        return None
    ctx = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    ctx.minimum_version = ssl.TLSVersion.TLSv1_2
    try:
        ctx.load_cert_chain(settings.tls_cert, settings.tls_key)
    except (OSError, ssl.SSLError) as e:
        raise ConfigError(
            f"{settings.origin}: tls: cannot load {settings.tls_cert} / {settings.tls_key}: {e}"
        ) from e
    return ctx


def _serve(args: argparse.Namespace) -> int:
    import structlog

    from listenpost.collector.app import create_app
    from listenpost.collector.config import load_settings
    from listenpost.core.clock import SystemClock
    from listenpost.core.logs import configure

    settings = load_settings(
        args.config,
        environ=os.environ,
        state_dir=str(args.state_dir),
        db_url=args.db,
        host=args.host,
        port=args.port,
    )
    configure(args.log_format)
    ssl_ctx = tls_context(settings)
    app = create_app(settings, clock=SystemClock())
    log = structlog.get_logger("listenpost.collector.cli")
    try:
        asyncio.run(_serve_until_signal(app, settings, ssl_ctx, log))
    except OSError as e:
        # the port is taken or the address is not ours: say so once, before READY was ever sent
        why = os.strerror(e.errno) if e.errno else str(e)
        print(f"listenpost: cannot listen on {settings.host}:{settings.port}: {why}", file=sys.stderr)
        return 2
    return 0


async def _serve_until_signal(app: Any, settings: Any, ssl_ctx: Any, log: Any) -> None:
    """Bind, then say READY and log ``collector_listening``; serve until SIGTERM or SIGINT."""
    import signal

    from aiohttp import web

    from listenpost.core.notify import Notifier

    notifier = Notifier()
    runner = web.AppRunner(app, access_log=None)
    starting = asyncio.create_task(_while_starting(notifier))
    try:
        await runner.setup()  # opens the store: its schema migrations run here
    finally:
        starting.cancel()
    try:
        site = web.TCPSite(runner, settings.host, settings.port, ssl_context=ssl_ctx)
        await site.start()  # raises OSError if the port cannot be bound
        url = f"{'https' if ssl_ctx else 'http'}://{settings.host}:{settings.port}"
        log.info("collector_listening", url=url, health_page=url + "/", public_url=settings.public_url)
        notifier.ready(f"listening on {url}")
        watchdog = asyncio.create_task(_watchdog(notifier)) if notifier.watchdog_interval else None
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, stop.set)
        await stop.wait()
        log.info("collector_stopping")
        notifier.stopping()
        if watchdog is not None:
            watchdog.cancel()
    finally:
        await runner.cleanup()


START_EXTEND_S = 60.0
"""While the store opens, systemd is asked for this much more start time, a third of it before it runs out."""


async def _while_starting(notifier: Any, extend_s: float = START_EXTEND_S) -> None:
    """
    Keep systemd waiting while the collector starts. A schema migration of a large database (moving a
    week of readings into day partitions takes tens of seconds, longer on slow disks) can outlast the
    unit's start timeout (90 s by default); systemd would kill it mid-migration, which rolls back, and
    start it into the same migration again, for ever.
    """
    while True:
        notifier.extend_timeout(extend_s, "starting: opening the store (a schema migration may take minutes)")
        await asyncio.sleep(extend_s / 3)


async def _watchdog(notifier: Any) -> None:
    while True:
        notifier.watchdog()
        await asyncio.sleep(notifier.watchdog_interval)


# ------------------------------------------------------------------ admin client


def admin_token(args: argparse.Namespace) -> str:
    """The admin token: ``--state-dir`` first, then ``$LISTENPOST_ADMIN_TOKEN``, then the default state dir."""
    from listenpost.collector.http.auth import ADMIN_TOKEN_ENV, read_admin_token

    if args.state_dir is None and os.environ.get(ADMIN_TOKEN_ENV):
        return os.environ[ADMIN_TOKEN_ENV].strip()
    try:
        return read_admin_token(args.state_dir if args.state_dir is not None else DEFAULT_STATE_DIR)
    except ConfigError as e:
        raise ConfigError(
            f"{e}; give --state-dir DIR (the collector's own --state-dir, where it wrote "
            f"admin-token at first start) or set ${ADMIN_TOKEN_ENV}"
        ) from None


def collector_url(text: str) -> str:
    """``--collector`` checked: an http(s) URL with a host, without a trailing slash."""
    from urllib.parse import urlsplit

    try:
        parts = urlsplit(text.strip())
        parts.port  # noqa: B018 - a bad port only raises when read
    except ValueError as e:
        raise ConfigError(f"--collector: {e}: {text!r}") from None
    if parts.scheme not in ("http", "https") or not parts.hostname:
        raise ConfigError(
            f"--collector: must be an http(s) URL like http://10.0.0.2:8470, got {text!r} "
            "(or set $LISTENPOST_COLLECTOR)"
        )
    return text.strip().rstrip("/")


def request(
    args: argparse.Namespace,
    method: str,
    path: str,
    *,
    body: Any = None,
    params: Sequence[tuple[str, str]] | None = None,
    raw: bool = False,
    auth: bool = True,
) -> Any:
    """One API call with a total timeout; returns the JSON answer (or bytes with ``raw``). ``auth``:
    send the admin token (public endpoints such as ``/v1/status`` need none)."""
    return asyncio.run(_request(args, method, path, body=body, params=params, raw=raw, auth=auth))


async def _request(
    args: argparse.Namespace, method: str, path: str, *, body: Any, params: Any, raw: bool, auth: bool = True
) -> Any:
    import aiohttp

    base = collector_url(args.collector)
    headers = {"Authorization": f"Bearer {admin_token(args)}"} if auth else {}
    url = base + path
    timeout = aiohttp.ClientTimeout(total=args.timeout, connect=min(args.timeout, 10.0))
    try:
        async with (
            aiohttp.ClientSession(timeout=timeout) as session,
            session.request(method, url, json=body, params=params, headers=headers) as resp,
        ):
            data = await resp.read()
            if resp.status >= 400:
                _raise_for(resp.status, data, url, base)
            return data if raw else json.loads(data)
    except (aiohttp.ClientConnectionError, aiohttp.InvalidURL, OSError) as e:
        raise AdminError(f"cannot reach the collector at {args.collector}: {e}") from e
    except TimeoutError as e:
        raise AdminError(f"the collector at {args.collector} did not answer within {args.timeout:g} s") from e


_HINTS = {
    "unknown_board": "'listenpost collector board list' shows the boards",
    "no_readings": "is the board live and the tag beside it? --minutes widens the window",
}


def _raise_for(status: int, data: bytes, url: str, base: str) -> None:
    """
    Turn an error answer into the CLI's error: a mistake in what was asked (400, 404 for a name) is a
    `ConfigError` (exit 2); anything else an `AdminError` (exit 1).
    """
    try:
        err = json.loads(data)["error"]
        msg, code = err.get("message") or err.get("code"), err.get("code")
    except (ValueError, KeyError, TypeError, AttributeError):
        err, msg, code = None, data[:200].decode("utf-8", "replace").strip(), None
    if status == 401:
        raise AdminError(
            "the collector refused the admin token (check --state-dir or $LISTENPOST_ADMIN_TOKEN)"
        )
    if status in (404, 405) and (err is None or code in ("not_found", "method_not_allowed")):
        # No such route: a proxy, another service, or a path after the port in --collector.
        raise AdminError(
            f"{url} answered {status}: is {base} a listenpost collector (no path after the port)?"
        )
    hint = _HINTS.get(code or "")
    text = f"{msg}; {hint}" if hint else str(msg)
    if status in (400, 404):
        raise ConfigError(text if status == 404 else f"the collector rejected the request: {text}")
    raise AdminError(f"the collector answered {status}: {text}")


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str], right: Sequence[int] = ()) -> str:
    """Columns aligned for a terminal; ``right`` lists the numeric columns."""
    cells = [[str(h) for h in headers]] + [["–" if v is None else str(v) for v in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    lines = []
    for n, r in enumerate(cells):
        lines.append(
            "  ".join(
                v.rjust(w) if i in right else v.ljust(w)
                for i, (v, w) in enumerate(zip(r, widths, strict=True))
            ).rstrip()
        )
        if n == 0:
            lines.append("  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _out(text: str) -> None:
    sys.stdout.write(text + "\n")


def _fmt_time(t: float | None) -> str | None:
    return None if t is None else datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M:%S")


def parse_time(text: str, what: str) -> float:
    """Unix seconds or ISO-8601 (a time without a zone is UTC)."""
    try:
        return float(text)
    except ValueError:
        pass
    try:
        dt = datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise ConfigError(f"{what}: must be ISO-8601 or Unix seconds, got {text!r}") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


# ------------------------------------------------------------------ boards


def _write_bundle(args: argparse.Namespace, answer: dict[str, Any]) -> Path | None:
    if not getattr(args, "bundle", None):
        return None
    from listenpost.collector.provision import write_bundle

    extra = {"package": args.package} if getattr(args, "package", None) else {}
    write_bundle(
        args.bundle,
        force=args.force,
        network=_network(args),
        board=answer["name"],
        room=answer["room"],
        floor=answer.get("floor"),
        code=answer["code"],
        collector_url=_board_url(args, answer),
        expires_at=answer["code_expires_at"],
        **extra,
    )
    return args.bundle


def _board_url(args: argparse.Namespace, answer: dict[str, Any]) -> str:
    """The URL a board is told to use: the collector's public_url, else the one this command used."""
    return str(answer.get("collector_url") or collector_url(args.collector))


def _loopback(url: str) -> bool:
    import ipaddress
    from urllib.parse import urlsplit

    host = urlsplit(url).hostname or ""
    if host == "localhost" or host.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _print_code(args: argparse.Namespace, answer: dict[str, Any], verb: str) -> int:
    bundle = _write_bundle(args, answer)
    url = _board_url(args, answer)
    if _loopback(url):
        # On the board, 127.0.0.1 is the board itself: such a code or bundle can only work on this machine.
        print(
            f"listenpost: warning: boards are told to reach the collector at {url}, a loopback address; "
            "set public_url in collector.yaml (and listen.host or --host to an address the boards can "
            "reach), or run this command with --collector URL as the boards see it",
            file=sys.stderr,
        )
    if args.json:
        _out(json.dumps({**answer, "bundle": str(bundle) if bundle else None}))
        return 0
    _out(
        f"{verb} board {answer['name']} (room {answer['room']}"
        f"{', floor ' + answer['floor'] if answer.get('floor') else ''})"
    )
    _out(
        f"enrollment code: {answer['code']}   (one use, valid until {_fmt_time(answer['code_expires_at'])} UTC)"
    )
    _out(f"on the board:    listenpost agent enroll --collector {url} --code {answer['code']}")
    if bundle:
        _out(
            f"bundle written:  {bundle}/ (copy user-data and meta-data to the card's boot partition; "
            "see README.txt there)"
        )
    return 0


def _check_bundle_possible(args: argparse.Namespace) -> None:
    """Fail before the collector is asked for a code, so a bundle problem never leaves a half-done board."""
    if getattr(args, "bundle", None):
        from listenpost.collector.provision import agent_unit, check_bundle_dir, package_spec

        agent_unit()
        package_spec(getattr(args, "package", None))
        check_bundle_dir(args.bundle, args.name, force=args.force)
        _network(args)
    elif getattr(args, "wifi_ssid", None) or getattr(args, "wifi_passphrase_file", None):
        raise ConfigError("--wifi-ssid: only with --bundle DIR (it goes into the bundle's network-config)")


def _board_add(args: argparse.Namespace) -> int:
    from listenpost.collector.provision import FLOOR_MAX, ROOM_MAX, check_board_name, check_label

    # The collector checks the same way; checking here first names the option as typed.
    body = {
        "name": check_board_name("name", args.name),
        "room": check_label("--room", args.room, max_len=ROOM_MAX),
        "floor": check_label("--floor", args.floor, max_len=FLOOR_MAX, required=False),
    }
    _check_bundle_possible(args)
    answer = request(args, "POST", "/v1/admin/boards", body=body)
    return _print_code(args, answer, "added")


def _board_reissue(args: argparse.Namespace) -> int:
    _check_bundle_possible(args)
    answer = request(args, "POST", f"/v1/admin/boards/{args.name}/reissue")
    return _print_code(args, answer, "new code for")


def _board_list(args: argparse.Namespace) -> int:
    answer = request(args, "GET", "/v1/admin/boards")
    if args.json:
        _out(json.dumps(answer))
        return 0
    rows = [
        (
            b["name"],
            b["room"],
            b["floor"],
            "yes" if b["enrolled_at"] else "no",
            f"{b['offset_db']:+.1f}",
            "retired" if b["retired_at"] else "",
        )
        for b in answer["boards"]
    ]
    _out(table(rows, ("BOARD", "ROOM", "FLOOR", "ENROLLED", "OFFSET dB", ""), right=(4,)))
    return 0


def _board_show(args: argparse.Namespace) -> int:
    b = request(args, "GET", f"/v1/admin/boards/{args.name}")
    if args.json:
        _out(json.dumps(b))
        return 0
    hb = b["last_heartbeat"]
    pairs = [
        ("board", b["name"]),
        ("room", b["room"]),
        ("floor", b["floor"]),
        ("state", b["state"]),
        ("reason", b["state_reason"]),
        ("enrolled", _fmt_time(b["enrolled_at"])),
        ("retired", _fmt_time(b["retired_at"])),
        ("offset", f"{b['offset_db']:+.1f} dB"),
        ("readings", b["readings_total"]),
        ("batches", b["batches_total"]),
        ("last batch", _fmt_time(b["last_batch_at"])),
        ("last heartbeat", _fmt_time(hb["at"]) if hb else None),
        ("fingerprint", json.dumps(b["fingerprint"]) if b["fingerprint"] else None),
    ]
    width = max(len(k) for k, _ in pairs)
    for k, v in pairs:
        _out(f"{k.ljust(width)}  {'–' if v is None else v}")
    if b["calibrations"]:
        _out("\ncalibrations:")
        _out(
            table(
                [
                    (
                        _fmt_time(c["at"]),
                        f"{c['offset_db']:+.1f}",
                        f"{c['spread_db']:.1f}",
                        c["samples"],
                        c["reference_tag"],
                        f"{c['distance_m']:g}",
                    )
                    for c in b["calibrations"]
                ],
                ("AT (UTC)", "OFFSET dB", "SPREAD dB", "SAMPLES", "TAG", "DIST m"),
                right=(1, 2, 3, 5),
            )
        )
    if b["recalibrate"]:
        _out("\n! the hardware fingerprint changed since the last calibration: calibrate again")
    return 0


def _board_retire(args: argparse.Namespace) -> int:
    request(args, "POST", f"/v1/admin/boards/{args.name}/retire")
    _out(f"retired board {args.name}")
    return 0


# ------------------------------------------------------------------ tags


def read_tag_file(path: Path) -> list[str]:
    """Canonical IDs from a tag file (one per line, ``#`` comments) or a CSV with an ``id`` column."""
    from listenpost.core.identity import load_tag_file, parse_tag_id

    try:
        text = path.read_text(encoding="utf-8")
    except OSError as e:
        raise ConfigError(f"{path}: cannot read: {e.strerror or e}") from e
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not UTF-8 text") from None
    first = next((ln for ln in text.splitlines() if ln.split("#", 1)[0].strip()), "")
    header = [c.strip().lower() for c in next(csv.reader([first]), [])] if "," in first else []
    if "id" not in header:
        return sorted(load_tag_file(path))
    out: list[str] = []
    col = header.index("id")
    reader = csv.reader(io.StringIO(text))
    seen_header = False
    for row in reader:
        line = reader.line_num
        if not row or not "".join(row).strip() or row[0].lstrip().startswith("#"):
            continue
        if not seen_header:
            seen_header = True
            continue
        if col >= len(row) or not row[col].strip():
            raise ConfigError(f"{path}:{line}: no value in the 'id' column")
        try:
            out.append(parse_tag_id(row[col]))
        except DecodeError as e:
            raise ConfigError(f"{path}:{line}: {e}") from None
    return out


def _tags_import(args: argparse.Namespace) -> int:
    ids = read_tag_file(args.file)
    if not ids:
        raise ConfigError(f"{args.file}: no tag identities found")
    answer = request(args, "POST", "/v1/admin/tags", body={"ids": ids})
    _out(f"{args.file}: {answer['given']} tags read, {answer['added']} new; {answer['total']} registered now")
    for rule, n in sorted((answer.get("without_rule") or {}).items()):
        _out(
            f"! {n} tags use the decode rule {rule!r}, which the collector's config does not define: no board "
            f"can hear them until decode.rules in collector.yaml has it (DEVELOPERS.md, 'How to add a decode rule')"
        )
    return 0


def _tags_list(args: argparse.Namespace) -> int:
    answer = request(args, "GET", "/v1/admin/tags", params=[("retired", "1")] if args.retired else None)
    for t in answer["tags"]:
        _out(t)
    return 0


def _tags_retire(args: argparse.Namespace) -> int:
    answer = request(args, "POST", "/v1/admin/tags/retire", body={"ids": args.ids})
    _out(f"retired {answer['retired']} of {answer['given']} tags")
    return 0


# ------------------------------------------------------------------ status, export, events


def _num(v: float | None, fmt: str) -> str | None:
    return None if v is None else format(v, fmt)


STATUS_FIGURES = (
    "last_contact_age_s",
    "readings_per_s",
    "clock_skew_ppm",
    "clock_residual_ms",
    "wall_error_ms",
    "spool_backlog_batches",
)
"""The figures of ``collector status``, labelled and printed as on the health page."""


def _status(args: argparse.Namespace) -> int:
    from listenpost.collector.status import FIGURE, STATE_LABELS, STATE_ORDER

    doc = request(args, "GET", "/v1/status", auth=False)  # public, like the health page
    if args.json:
        _out(json.dumps(doc))
        return 0
    f = doc["fleet"]
    by_state = f["by_state"]
    _out(
        f"{f['boards']} boards · {f['readings_total']:,} readings · {f['tags']} tags · "
        + ", ".join(
            f"{by_state[s]} {STATE_LABELS.get(s, (s,))[0]}"
            for s in (*STATE_ORDER, *sorted(set(by_state) - set(STATE_ORDER)))
            if by_state.get(s)
        )
    )
    figs = [FIGURE[k] for k in STATUS_FIGURES]
    rows = [
        (
            r["name"],
            r["room"],
            STATE_LABELS.get(r["state"], (r["state"],))[0],
            *(g.text(r[g.key]) for g in figs),
        )
        for r in doc["boards"]
    ]
    _out(table(rows, ("Board", "Room", "State", *(g.label for g in figs)), right=range(3, 3 + len(figs))))
    troubled = sorted(
        (r for r in doc["boards"] if r.get("attention")),
        key=lambda r: (r["attention"][0]["severity"], r["name"]),
    )
    if troubled:
        _out("\nNeeds attention, most urgent first:")
    for r in troubled:
        for i in r["attention"]:
            _out(f"  {r['name']} ({r['room']}): {i['what']}: {i['why']}")
            _out(f"      on site: {i['site']}")
            for c in i["commands"]:
                _out(f"      run: {c['run']}" + ("   (on the board)" if c["on"] == "board" else ""))
    return 0


def _plan_import(args: argparse.Namespace) -> int:
    from listenpost.collector.models.plan import load_plan

    plan = load_plan(args.file)  # ConfigError "FILE: floors[0].rooms[2].polygon: ...": exit 2
    answer = request(args, "PUT", "/v1/admin/plan", body=plan.to_document())
    _out(
        f"plan imported: {answer['floors']} floors, {answer['rooms']} rooms, {answer['boards']} boards, "
        f"{answer['reference_tags']} reference tags"
    )
    return 0


EXIT_NO_READINGS = 3
"""``export``: no reading matched the range and filters; nothing was written."""
EXPORT_POLL_S = 10.0
"""Longest the collector holds one export poll (less when --timeout is shorter)."""


def _export(args: argparse.Namespace) -> int:
    t_from, t_to = parse_time(args.t_from, "--from"), parse_time(args.t_to, "--to")
    if t_to <= t_from:
        raise ConfigError("--to: must be after --from")
    if args.bin <= 0:
        raise ConfigError("--bin: must be > 0 seconds")
    params = [("from", repr(t_from)), ("to", repr(t_to)), ("bin", repr(args.bin)), ("format", args.format)]
    params.append(("calibration", args.calibration))
    params += [("board", b) for b in args.board or []] + [("tag", t) for t in args.tag or []]
    return asyncio.run(_export_job(args, params))


async def _export_job(args: argparse.Namespace, params: list[tuple[str, str]]) -> int:
    """Start the export, poll it until it ends (each poll under --timeout), then download the file."""
    job = await _request(args, "POST", "/v1/admin/exports", body=None, params=params, raw=False)
    wait = f"{max(0.1, min(EXPORT_POLL_S, args.timeout / 2)):g}"  # answered well inside our timeout
    tty = sys.stderr.isatty()
    while job["state"] == "running":
        job = await _request(
            args, "GET", f"/v1/admin/exports/{job['job']}", body=None, params=[("wait", wait)], raw=False
        )
        if tty:
            share = "" if job["progress"] is None else f"{job['progress']:4.0%} · "
            sys.stderr.write(f"\rexport: {share}{job['rows_scanned']:,} rows scanned ")
            sys.stderr.flush()
    if tty:
        sys.stderr.write("\n")
    if job["state"] != "done":
        err = job.get("error") or {}
        text = err.get("message") or "the export failed"
        if err.get("code") == "bad_field":
            raise ConfigError(f"the collector rejected the request: {text}")
        raise AdminError(f"the export failed: {text}")
    if job["readings"] == 0:
        sys.stderr.write(
            f"listenpost: no readings matched {args.t_from} .. {args.t_to}"
            + (f" for boards {', '.join(args.board)}" if args.board else "")
            + (f" for tags {', '.join(args.tag)}" if args.tag else "")
            + f"; nothing written to {args.out} (exit {EXIT_NO_READINGS})\n"
        )
        return EXIT_NO_READINGS
    size = await _download(args, f"/v1/admin/exports/{job['job']}/file", args.out)
    _out(f"wrote {args.out} ({size:,} bytes, {args.format}, {job['readings']:,} readings)")
    if job.get("summary"):
        sys.stderr.write(_export_summary(job["summary"]) + "\n")
    return 0


def _export_summary(s: dict[str, Any]) -> str:
    """One line to check an export by before analysing it."""
    span = f"{_utc(s['t_from'])} .. {_utc(s['t_to'])}"
    return (
        f"export: {s['cells']:,} cells, {s['readings']:,} readings, {s['boards']} boards, {s['tags']} tags, "
        f"{span} ({s['bins']:,} bins), calibration {s['calibration']}"
    )


def _utc(t: float) -> str:
    return datetime.fromtimestamp(t, tz=UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


async def _download(args: argparse.Namespace, path: str, out: Path) -> int:
    """Stream a file to ``out`` (via ``out.part``, renamed when whole); --timeout bounds each read."""
    import aiohttp

    url = collector_url(args.collector) + path
    timeout = aiohttp.ClientTimeout(total=None, connect=min(args.timeout, 10.0), sock_read=args.timeout)
    tmp = out.with_name(out.name + ".part")
    size = 0
    try:
        async with (
            aiohttp.ClientSession(timeout=timeout) as session,
            session.get(url, headers={"Authorization": f"Bearer {admin_token(args)}"}) as resp,
        ):
            if resp.status >= 400:
                _raise_for(resp.status, await resp.read(), url, collector_url(args.collector))
            try:
                with tmp.open("wb") as f:
                    async for piece in resp.content.iter_chunked(1 << 20):
                        f.write(piece)
                        size += len(piece)
                os.replace(tmp, out)  # a half-written export never carries the final name
            except OSError as e:
                raise AdminError(f"{out}: cannot write: {e.strerror or e}") from e
    except (aiohttp.ClientConnectionError, aiohttp.InvalidURL) as e:
        raise AdminError(f"cannot reach the collector at {args.collector}: {e}") from e
    except TimeoutError as e:
        raise AdminError(f"the collector at {args.collector} sent nothing for {args.timeout:g} s") from e
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()
    return size


def _report(args: argparse.Namespace) -> int:
    t_from, t_to = parse_time(args.t_from, "--from"), parse_time(args.t_to, "--to")
    if t_to <= t_from:
        raise ConfigError("--to: must be after --from")
    if (args.walk_tag is None) != (args.walk_marks is None):
        raise ConfigError("--walk-tag: give it together with --walk-marks (or neither)")
    walk = (args.walk_tag, read_marks(args.walk_marks)) if args.walk_marks is not None else None
    try:
        args.out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise ConfigError(f"--out: cannot create {args.out.parent}: {e.strerror or e}") from None
    from listenpost.collector.report import gather, render

    async def call(method: str, path: str, *, params: Any = None, body: Any = None) -> Any:
        return await _request(args, method, path, body=body, params=params, raw=False, auth=True)

    async def download(path: str, out: Path) -> int:
        return await _download(args, path, out)

    try:
        data = asyncio.run(
            gather(
                call, download, collector=collector_url(args.collector), t_from=t_from, t_to=t_to, walk=walk
            )
        )
    except RuntimeError as e:
        raise AdminError(f"the readings export failed: {e}") from e
    page = render(data)
    tmp = args.out.with_name(args.out.name + ".part")
    try:
        tmp.write_text(page, encoding="utf-8")
        os.replace(tmp, args.out)  # a half-written report never carries the final name
    except OSError as e:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise AdminError(f"{args.out}: cannot write: {e.strerror or e}") from e
    _out(f"wrote {args.out} ({len(page.encode()):,} bytes, {sum(data.readings.values()):,} readings)")
    return 0


def _wheelhouse_build(args: argparse.Namespace) -> int:
    from listenpost.collector.http.wheelhouse import DEFAULT_PLATFORMS, build_wheelhouse, wheel_dir

    dest = wheel_dir(args.state_dir)
    wheels = build_wheelhouse(
        dest,
        platforms=args.platform or DEFAULT_PLATFORMS,
        python_version=args.python_version,
        wheel=args.wheel,
    )
    _out(f"{len(wheels)} wheels in {dest}/ (served under /wheels/):")
    for w in wheels:
        _out(f"  {w.name}")
    return 0


def _events(args: argparse.Namespace) -> int:
    params = [("since", str(args.since))] + ([("board", args.board)] if args.board else [])
    answer = request(args, "GET", "/v1/admin/events", params=params)
    if args.json:
        _out(json.dumps(answer))
        return 0
    rows = [
        (e["id"], _fmt_time(e["at"]), e["board"] or "", e["kind"], event_detail(e["kind"], e["detail"]))
        for e in answer["events"]
    ]
    _out(table(rows, ("ID", "AT (UTC)", "BOARD", "KIND", "DETAIL"), right=(0,)))
    return 0


def event_detail(kind: str, detail: Any) -> str:
    """One readable line for an event: ``old → new: reason`` for state changes, else ``key=value`` pairs."""
    if not isinstance(detail, dict):
        return "" if detail is None else str(detail)
    if kind == "state_changed" and "new" in detail:
        old = detail.get("old") or "–"
        reason = f": {detail['reason']}" if detail.get("reason") else ""
        return f"{old} → {detail['new']}{reason}"
    return " ".join(
        f"{k}={json.dumps(v, separators=(',', ':')) if isinstance(v, dict | list) else v}"
        for k, v in detail.items()
    )


# ------------------------------------------------------------------ calibration and walk test


def _calibrate(args: argparse.Namespace) -> int:
    if args.fleet:
        return _calibrate_fleet(args)
    if args.apply:
        raise ConfigError("--apply: only with --fleet (a single-board calibration is applied at once)")
    for flag, value in (("NAME", args.name), ("--tag", args.tag), ("--distance", args.distance)):
        if value is None:
            raise ConfigError(f"{flag}: required without --fleet")
    body = {
        "tag": args.tag,
        "distance_m": args.distance,
        "minutes": 5.0 if args.minutes is None else args.minutes,
        "power_1m_dbm": args.power_1m,
        "exponent": args.exponent,
    }
    answer = request(args, "POST", f"/v1/admin/boards/{args.name}/calibrate", body=body)
    if args.json:
        _out(json.dumps(answer))
        return 0
    _out(
        f"board {answer['board']}: offset {answer['offset_db']:+.1f} dB (was {answer['previous_offset_db']:+.1f}), "
        f"spread {answer['spread_db']:.1f} dB from {answer['samples']} readings of {answer['reference_tag']} "
        f"at {answer['distance_m']:g} m (raw median {answer['median_dbm']:.1f} dBm)"
    )
    for w in answer["warnings"]:
        _out(f"! {_CALIBRATION_WARNINGS.get(w, w)}")
    if answer["warnings"]:
        _out("  The offset was applied; fix the cause and calibrate again to replace it.")
    return 0


def _calibrate_fleet(args: argparse.Namespace) -> int:
    if args.name or args.tag or args.distance is not None:
        raise ConfigError("--fleet: takes no NAME, --tag or --distance (the plan gives them)")
    body: dict[str, Any] = {"minutes": 30.0 if args.minutes is None else args.minutes, "apply": args.apply}
    if args.wall_db is not None:
        body["wall_db"] = args.wall_db
    if args.floor_db is not None:
        body["floor_db"] = args.floor_db
    answer = request(args, "POST", "/v1/admin/calibrate/fleet", body=body)
    if args.json:
        _out(json.dumps(answer))
        return 0
    _out(
        f"exponent {answer['exponent']:.2f} ± {answer['exponent_stderr'] or 0:.2f}, "
        f"wall {answer['wall_db']:.1f} dB, floor {answer['floor_db']:.1f} dB, "
        f"residual σ {answer['sigma_db']:.2f} dB, last {answer['minutes']:g} minutes"
    )
    _out(f"{'board':<12} {'offset dB':>10} {'± dB':>6} {'resid dB':>9} {'tags':>5}")
    for b in answer["boards"]:
        se = "—" if b["stderr_db"] is None else f"{b['stderr_db']:.1f}"
        _out(f"{b['board']:<12} {b['offset_db']:>+10.1f} {se:>6} {b['residual_db']:>9.1f} {b['tags']:>5}")
    if answer.get("losses_held"):
        _out("! the reference tags heard do not fix the wall and floor losses: held at the values shown")
    if not answer.get("exponent_plausible", True):
        _out("! the exponent is outside the indoor range 1.6–3.3: check the plan's reference tag positions")
    if answer["unheard"]:
        _out(f"! no usable reference tag, offset unchanged: {', '.join(answer['unheard'])}")
    if answer["applied"]:
        _out(f"applied to {len(answer['applied'])} boards")
    else:
        _out("not applied (add --apply)")
    return 0


_CALIBRATION_WARNINGS = {
    "too_few_samples": "few readings: leave the tag in place longer (or give a larger --minutes)",
    "spread_too_wide": "the readings spread widely: people or reflections moved around the tag; calibrate when "
    "the room is quiet",
    "offset_large": "an offset this large usually means a wrong --distance, the wrong reference tag (see "
    "--power-1m) or a damaged antenna",
}


def read_marks(path: Path) -> list[dict[str, Any]]:
    """Walk-test marks: CSV ``room,from,to``; errors name ``file:line``."""
    from listenpost.collector.provision import ROOM_MAX, check_label

    try:
        text = path.read_text(encoding="utf-8")
    except OSError as e:
        raise ConfigError(f"{path}: cannot read: {e.strerror or e}") from e
    reader = csv.DictReader(io.StringIO(text))
    missing = {"room", "from", "to"} - {(h or "").strip().lower() for h in reader.fieldnames or []}
    if missing:
        raise ConfigError(
            f"{path}:1: header must name the columns room, from, to (missing {', '.join(sorted(missing))})"
        )
    marks = []
    for row in reader:
        row = {(k or "").strip().lower(): (v or "").strip() for k, v in row.items()}
        if not any(row.values()) or row["room"].startswith("#"):
            continue
        where = f"{path}:{reader.line_num}"
        if not row["room"]:
            raise ConfigError(f"{where}: room is empty")
        marks.append(
            {
                "room": check_label(f"{where}: room", row["room"], max_len=ROOM_MAX),
                "from": parse_time(row["from"], f"{where}: from"),
                "to": parse_time(row["to"], f"{where}: to"),
            }
        )
        if marks[-1]["to"] <= marks[-1]["from"]:
            raise ConfigError(f"{where}: to must be after from")
    if not marks:
        raise ConfigError(f"{path}: no marks")
    return marks


def _walktest(args: argparse.Namespace) -> int:
    answer = request(
        args, "POST", "/v1/admin/walktest", body={"tag": args.tag, "marks": read_marks(args.marks)}
    )
    if args.json:
        _out(json.dumps(answer))
        return 0
    rows = []
    for r in answer["rooms"]:
        best, heard = r["strongest"], r["heard"]
        runner = heard[1]["board"] if len(heard) > 1 else None
        rows.append(
            (
                r["room"],
                best["board"] if best else "nobody",
                _num(best["median_dbm"] if best else None, ".1f"),
                runner,
                _num(r["margin_db"], ".1f"),
                None if not best else "yes" if r["strongest_in_room"] else "NO",
                ", ".join(h["board"] for h in r["overlap"]),
                f"{100 * r['seconds_share']:.0f}",
            )
        )
    _out(
        table(
            rows,
            (
                "ROOM",
                "STRONGEST",
                "dBm",
                "RUNNER-UP",
                "MARGIN dB",
                "IN ROOM",
                "OVERLAP (other rooms)",
                "COVER %",
            ),
            right=(2, 4, 7),
        )
    )
    return 0
