"""
The provisioning bundle for a freshly flashed card (``collector board add NAME --bundle DIR``).

Files written to DIR:

- ``user-data`` — cloud-init cloud-config: sets the hostname, creates the service account, installs the
  agent into a virtualenv and its units, and starts the enroll unit, which trades the one-time code for
  the board's credential (retrying until the collector answers) and then starts the agent.
- ``meta-data`` — cloud-init NoCloud instance id and hostname.
- ``network-config`` — cloud-init network config v2: Wi-Fi (SSID, passphrase, country) or wired DHCP.
- ``agent.yaml`` — the agent config the board will run with (``agent enroll`` writes the final one;
  this copy is for the installer's records and for boards enrolled by hand).
- ``README.txt`` — what to copy where.

The enrollment code is single-use and expires; the card is sensitive only until the board's first boot.
"""

from __future__ import annotations

import os
import re
import secrets
import unicodedata
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any

import yaml

from listenpost.core.errors import ConfigError
from listenpost.core.settings import BOARD_NAME

AGENT_PREFIX = "/opt/listenpost"
AGENT_STATE_DIR = "/var/lib/listenpost/agent"
UNIT_NAME = "listenpost-agent.service"
ENROLL_UNIT = "listenpost-enroll.service"
SYSUSERS_FILE = "listenpost-sysusers.conf"
UNITS_DIR = Path(str(resources.files("listenpost.systemd")))  # package data of the wheel
UNIT_SOURCE = UNITS_DIR / UNIT_NAME
ENROLL_ENV = "/etc/listenpost/enroll.env"
ENROLL_CODE = "/etc/listenpost/enroll-code"
"""The enroll unit's inputs (its EnvironmentFile= and LoadCredential= source)."""


# Control characters (C0, DEL, C1: newlines, escapes), format characters (bidi overrides, zero-width),
# lone surrogates and the Unicode line/paragraph separators: none belongs in a name, and each can
# break the line structure of a file or a terminal that shows the name.
_UNSAFE_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp"})


def _unsafe_bmp_class() -> str:
    """
    The unsafe characters of the Basic Multilingual Plane as regex class ranges (``\\uXXXX-\\uYYYY``),
    surrogates left out: a JSON body cannot carry a lone one (listenpost.core.jsonload refuses it), and
    regex engines without UTF-16 strings refuse a pattern that names them.
    """
    ranges: list[tuple[int, int]] = []
    for cp in range(0x10000):
        if unicodedata.category(chr(cp)) in _UNSAFE_CATEGORIES - {"Cs"}:
            if ranges and ranges[-1][1] == cp - 1:
                ranges[-1] = (ranges[-1][0], cp)
            else:
                ranges.append((cp, cp))
    return "".join(f"\\u{a:04x}" if a == b else f"\\u{a:04x}-\\u{b:04x}" for a, b in ranges)


_NO_UNSAFE = _unsafe_bmp_class()
LABEL_PATTERN = f"^[^{_NO_UNSAFE}]*[^{_NO_UNSAFE}\\s][^{_NO_UNSAFE}]*$"
"""
What `check_label` accepts, for the OpenAPI document: not blank, no unsafe character of the Basic
Multilingual Plane (the few format characters above it are refused too, but \\u escapes cannot name
them in both Python and ECMA-262 regular expressions).
"""


USER_DATA_HEADER = (
    "#cloud-config\n# listenpost board provisioning: README.txt beside this file says what it does.\n"
)


ROOM_MAX = 100
"""Longest room name (characters), in the admin API and the CLI alike."""
FLOOR_MAX = 40
"""Longest floor label (characters)."""


class BadLabel(ConfigError):
    """An admin-entered value that is refused; ``field`` names it (``room``, ``--room``, ...)."""

    def __init__(self, field: str, reason: str) -> None:
        super().__init__(f"{field}: {reason}")
        self.field = field
        self.reason = reason


def check_label(field: str, value: object, *, max_len: int = 100, required: bool = True) -> str | None:
    """
    A free-text name an admin entered (room, floor, walk-test room), stripped; the one check the
    admin API and the CLI both use.

    Raises:
        BadLabel: not a string, empty, longer than ``max_len``, or holding a control character.
    """
    if value is None and not required:
        return None
    if not isinstance(value, str) or not value.strip() or len(value) > max_len:
        raise BadLabel(field, f"must be a non-empty string of at most {max_len} characters")
    for c in value:
        if unicodedata.category(c) in _UNSAFE_CATEGORIES:
            raise BadLabel(field, f"must not contain control characters (found U+{ord(c):04X})")
    return value.strip()


def check_board_name(field: str, value: object) -> str:
    """
    A board name (`listenpost.core.settings.BOARD_NAME`): it becomes the board's hostname.

    Raises:
        BadLabel: anything else.
    """
    if not isinstance(value, str) or not BOARD_NAME.fullmatch(value):
        raise BadLabel(
            field, "must be 1-63 lower-case letters, digits, '.', '_' or '-', starting with a letter or digit"
        )
    return value


@dataclass(frozen=True, slots=True)
class Network:
    """How the board joins the venue network; no SSID means wired (DHCP on eth0)."""

    wifi_ssid: str | None = None
    wifi_passphrase: str | None = field(default=None, repr=False)
    wifi_country: str | None = None
    """Regulatory domain (ISO 3166 alpha-2): without it some boards keep Wi-Fi off."""


def check_network(net: Network) -> Network:
    """
    Raises:
        ConfigError: naming the option: an SSID of more than 32 bytes, a passphrase that is not 8-63
            printable ASCII characters or 64 hex digits (IEEE 802.11i WPA-PSK), a bad country code.
    """
    if net.wifi_ssid is None:
        if net.wifi_passphrase is not None or net.wifi_country is not None:
            raise ConfigError("--wifi-ssid: needed with --wifi-passphrase-file and --wifi-country")
        return net
    check_label("--wifi-ssid", net.wifi_ssid, max_len=32)
    if len(net.wifi_ssid.encode()) > 32:
        raise ConfigError("--wifi-ssid: must be at most 32 bytes in UTF-8")
    pw = net.wifi_passphrase
    if pw is None:
        raise ConfigError(
            "--wifi-passphrase-file: needed with --wifi-ssid (the passphrase never goes on the command line)"
        )
    if not (8 <= len(pw) <= 63 and all(" " <= c <= "~" for c in pw)) and not re.fullmatch(
        r"[0-9a-fA-F]{64}", pw
    ):
        raise ConfigError(
            "--wifi-passphrase-file: the passphrase must be 8-63 printable ASCII characters or 64 hex digits"
        )
    if net.wifi_country is not None and not re.fullmatch(r"[A-Z]{2}", net.wifi_country):
        raise ConfigError(
            f"--wifi-country: must be two upper-case letters (ISO 3166), got {net.wifi_country!r}"
        )
    return net


def read_passphrase(path: str | Path) -> str:
    """The Wi-Fi passphrase from a file: one line, its line break dropped."""
    try:
        text = Path(path).read_text()
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError(
            f"--wifi-passphrase-file: {path}: cannot read: {getattr(e, 'strerror', None) or e}"
        ) from e
    lines = text.splitlines()
    if len(lines) != 1:
        raise ConfigError(f"--wifi-passphrase-file: {path}: must hold the passphrase on one line")
    return lines[0]


def network_config(net: Network) -> dict[str, Any]:
    """cloud-init network config version 2 (the netplan format) for NoCloud's ``network-config``."""
    if net.wifi_ssid is None:
        return {"network": {"version": 2, "ethernets": {"eth0": {"dhcp4": True, "dhcp6": True}}}}
    wlan: dict[str, Any] = {
        "dhcp4": True,
        "dhcp6": True,
        "access-points": {net.wifi_ssid: {"password": net.wifi_passphrase}},
    }
    if net.wifi_country:
        wlan["regulatory-domain"] = net.wifi_country
    # eth0 stays usable for a technician's cable; optional, so boot does not wait for it.
    return {
        "network": {
            "version": 2,
            "ethernets": {"eth0": {"dhcp4": True, "optional": True}},
            "wifis": {"wlan0": wlan},
        }
    }


TIME_SYNC_WAIT_S = 180
"""How long first boot waits for the clock to be synchronised before apt and pip (bounded: a venue
network may have no time server, and a plain-HTTP collector and wheelhouse do not need one)."""


class _Literal(str):
    """A string YAML writes as a ``|`` block (unit files stay readable in user-data)."""


def _literal(dumper: yaml.SafeDumper, data: _Literal) -> yaml.ScalarNode:
    return dumper.represent_scalar("tag:yaml.org,2002:str", data, style="|")


class _Dumper(yaml.SafeDumper):
    pass


_Dumper.add_representer(_Literal, _literal)


def agent_unit(source: Path = UNIT_SOURCE) -> str:
    """A unit of the project (the agent's by default) with ExecStart pointed at the bundle's virtualenv."""
    try:
        text = source.read_text()
    except OSError as e:
        raise ConfigError(f"{source}: cannot read the unit for the bundle: {e.strerror or e}") from e
    lines = []
    for line in text.splitlines():
        m = re.match(r"^(ExecStart=[-@:+!]*)(\S+)(.*)$", line)
        if m and m.group(2).endswith("listenpost"):
            line = f"{m.group(1)}{AGENT_PREFIX}/bin/listenpost{m.group(3)}"
        lines.append(line)
    return "\n".join(lines) + "\n"


def agent_config(board: str, collector_url: str) -> dict[str, Any]:
    """The agent.yaml of a board enrolled into ``AGENT_STATE_DIR`` (accepted by ``agent check-config``)."""
    return {
        "board": board,
        "state_dir": AGENT_STATE_DIR,
        "collector": {"url": collector_url.rstrip("/"), "credential_file": "credential"},
        "source": {"kind": "bleak"},
    }


def default_package() -> str:
    """The pip requirement of the agent this collector runs with: ``listenpost==<installed version>``."""
    from importlib.metadata import PackageNotFoundError
    from importlib.metadata import version as dist_version

    try:
        return f"listenpost=={dist_version('listenpost')}"
    except PackageNotFoundError:
        return "listenpost"


def package_spec(package: str | None) -> str:
    """
    ``--package`` checked, or `default_package` when it is not given.

    Raises:
        ConfigError: more than one word (user-data passes it to pip as a single argument).
    """
    spec = package.strip() if package and package.strip() else default_package()
    check_label("--package", spec, max_len=4096)
    if any(c.isspace() for c in spec):
        raise ConfigError(f"--package: one pip requirement, URL or path without spaces, got {package!r}")
    return spec


def install_command(pip: str, spec: str, collector_url: str, *, own_wheelhouse: bool) -> list[str]:
    """
    The first boot's pip command: from the collector's wheelhouse only (``--no-index``: a venue
    network often has no internet), or, for an explicit ``--package``, as pip finds that.
    """
    if not own_wheelhouse:
        return [pip, "install", "--upgrade", spec]
    from urllib.parse import urlsplit

    cmd = [pip, "install", "--no-index", "--find-links", f"{collector_url}/wheels/"]
    parts = urlsplit(collector_url)
    if parts.scheme == "http" and parts.hostname:
        cmd += ["--trusted-host", parts.hostname]  # pip ignores plain-HTTP links of other hosts otherwise
    return [*cmd, spec]


def build_bundle(
    *,
    board: str,
    room: str,
    floor: str | None,
    code: str,
    collector_url: str,
    expires_at: float,
    package: str | None = None,
    network: Network | None = None,
    unit_source: Path = UNIT_SOURCE,
) -> dict[str, str]:
    """
    File name → content of the bundle.

    Args:
        package: what the first boot pip-installs as the agent: a requirement, a wheel URL or a path on
            the card (default `default_package`); it must be reachable from the board.
        network: the board's network (default wired), written as ``network-config``.
    """
    from datetime import UTC, datetime

    spec = package_spec(package)
    # Both go into one-line files the enroll unit reads (EnvironmentFile=, the code credential).
    for what, value in (("collector URL", collector_url), ("code", code)):
        if not value.strip() or any(
            c.isspace() or unicodedata.category(c) in _UNSAFE_CATEGORIES for c in value.strip()
        ):
            raise ConfigError(f"{what}: must be one word without spaces or control characters, got {value!r}")
    code = code.strip()
    expires = datetime.fromtimestamp(expires_at, UTC).strftime("%Y-%m-%d %H:%M UTC")
    url = collector_url.rstrip("/")
    pip = f"{AGENT_PREFIX}/bin/pip"
    units = unit_source.parent
    net = check_network(network or Network())
    # A board has no real-time clock: until NTP answers it may think it is 1970, and apt (Release
    # dates) or TLS would fail. So packages are installed from runcmd, after a bounded wait for the
    # clock, and only when the image lacks them (a venue network may have no internet at all).
    time_wait = (
        f"timeout {TIME_SYNC_WAIT_S} /lib/systemd/systemd-time-wait-sync || "
        f"echo 'listenpost: clock not synchronised after {TIME_SYNC_WAIT_S} s; going on' >&2"
    )
    packages = "python3-venv bluez"
    apt = f"dpkg -s {packages} >/dev/null 2>&1 || {{ apt-get update && apt-get install -y {packages}; }}"
    cloud = {
        "hostname": board,
        "preserve_hostname": False,
        "manage_etc_hosts": True,
        "write_files": [
            # The account the units run as (User=listenpost), created by systemd-sysusers below.
            _file("/etc/sysusers.d/listenpost.conf", _read(units / SYSUSERS_FILE), "0644"),
            _file(f"/etc/systemd/system/{UNIT_NAME}", agent_unit(unit_source), "0644"),
            _file(f"/etc/systemd/system/{ENROLL_UNIT}", agent_unit(units / ENROLL_UNIT), "0644"),
            # What the enroll unit needs: where the collector is, and the code (root only; the unit
            # hands it to the agent's user as a credential).
            _file(ENROLL_ENV, f"LISTENPOST_COLLECTOR={url}\n", "0644"),
            _file(ENROLL_CODE, code + "\n", "0600"),
        ],
        "runcmd": [
            ["systemd-sysusers"],
            ["sh", "-c", time_wait],
            ["sh", "-c", apt],
            ["python3", "-m", "venv", AGENT_PREFIX],
            install_command(pip, spec, url, own_wheelhouse=package is None),
            ["systemctl", "daemon-reload"],
            # Enrollment is a unit of its own: it retries an unreachable collector until it answers
            # (or refuses the code), then starts the agent. --no-block: cloud-init does not wait for it.
            ["systemctl", "enable", "--now", "--no-block", ENROLL_UNIT],
        ],
    }
    # Every value reaches the file through the YAML emitter, which quotes and escapes as needed; the
    # header is constant, because a name interpolated into it could start a line of its own.
    user_data = USER_DATA_HEADER + yaml.dump(
        cloud, Dumper=_Dumper, sort_keys=False, default_flow_style=None, width=120
    )
    meta = {"instance-id": f"listenpost-{board}-{secrets.token_hex(4)}", "local-hostname": board}
    readme = (
        f"Provisioning bundle for board {board} (room {room}{', floor ' + floor if floor else ''}).\n\n"
        "1. Flash the board's OS image to the card.\n"
        "2. Copy user-data, meta-data and network-config to the card's boot partition (cloud-init\n"
        f"   NoCloud). network-config joins {'Wi-Fi ' + repr(net.wifi_ssid) if net.wifi_ssid else 'the wired network (DHCP)'}; it holds any Wi-Fi passphrase.\n"
        "3. Mount the board, power it on; on first boot it installs the agent and starts\n"
        f"   {ENROLL_UNIT}, which keeps trying the collector until it answers, enrolls, then starts\n"
        "   the agent (journalctl -u listenpost-enroll shows each try).\n"
        + (
            f"   pip installs {spec} from the collector's wheelhouse ({url}/wheels/, filled by\n"
            "   'listenpost collector wheelhouse build' for the boards' platform): no internet needed,\n"
            if package is None
            else f"   pip installs {spec} (from PyPI unless that is a URL or path),\n"
        )
        + "   and the board must reach the collector at\n"
        f"   {url}.\n"
        f"   By hand instead: listenpost agent enroll --collector {url} --code {code}\n"
        "4. Check the health page: the board appears as 'live' within a minute.\n\n"
        f"The enrollment code works once and expires {expires}; after a re-flash or expiry run "
        "'listenpost collector board reissue "
        f"{board} --bundle DIR'.\n"
    )
    return {
        "user-data": user_data,
        "meta-data": yaml.safe_dump(meta, sort_keys=False),
        "network-config": yaml.safe_dump(network_config(net), sort_keys=False, allow_unicode=True),
        "agent.yaml": yaml.safe_dump(agent_config(board, url), sort_keys=False),
        "README.txt": readme,
    }


def bundle_owner(directory: str | Path) -> str | None:
    """
    The board whose bundle ``directory`` holds (``local-hostname`` of its meta-data), ``"?"`` for
    bundle files whose board cannot be read, None for a folder without a bundle.
    """
    d = Path(directory)
    if not any((d / name).exists() for name in ("user-data", "meta-data")):
        return None
    try:
        meta = yaml.safe_load((d / "meta-data").read_text())
    except (OSError, UnicodeDecodeError, yaml.YAMLError):
        return "?"
    name = meta.get("local-hostname") if isinstance(meta, dict) else None
    return name if isinstance(name, str) else "?"


def check_bundle_dir(directory: str | Path, board: str, *, force: bool = False) -> None:
    """
    Refuse to write ``board``'s bundle over another board's: two cards made from one folder would
    carry one code, and the first board to boot would leave the other unenrolled.

    Raises:
        ConfigError: ``directory`` is not a folder, or holds another board's bundle and not ``force``.
    """
    d = Path(directory)
    if d.exists() and not d.is_dir():
        raise ConfigError(f"--bundle: {d} exists and is not a directory")
    owner = bundle_owner(d)
    if owner is not None and owner != board and not force:
        who = "another board's bundle" if owner == "?" else f"the bundle of board {owner}"
        raise ConfigError(
            f"--bundle: {d} already holds {who}; choose an empty folder, or give --force to replace it"
        )


def _file(path: str, content: str, mode: str) -> dict[str, Any]:
    """One cloud-init write_files entry, owned by root."""
    return {"path": path, "owner": "root:root", "permissions": mode, "content": _Literal(content)}


def _read(path: Path) -> str:
    try:
        return path.read_text()
    except OSError as e:
        raise ConfigError(f"{path}: cannot read it for the bundle: {e.strerror or e}") from e


def write_bundle(directory: str | Path, *, force: bool = False, **kwargs: Any) -> list[Path]:
    """
    Write the bundle to ``directory`` (created); files holding the code are mode 0600.

    Raises:
        ConfigError: see `check_bundle_dir`.
    """
    d = Path(directory)
    check_bundle_dir(d, kwargs["board"], force=force)
    d.mkdir(parents=True, exist_ok=True)
    written = []
    for name, content in build_bundle(**kwargs).items():
        path = d / name
        tmp = d / f".{name}.tmp"
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w") as f:
            f.write(content)
        os.replace(tmp, path)
        written.append(path)
    return written
