"""
The unit files pass ``systemd-analyze verify`` (systemd 252 here; docs/references.md §9).

``verify`` exits 0 on warnings such as an unknown key, so stderr must be empty too; and it fails on an
``ExecStart=`` binary missing on this machine, so the copies point it at this Python.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import require_tool

UNITS = Path(__file__).resolve().parent.parent / "systemd"
ANALYZE = shutil.which("systemd-analyze")


@pytest.fixture(autouse=True)
def _systemd_analyze() -> None:
    require_tool("systemd-analyze")


def directives(path: Path) -> dict[str, list[str]]:
    """``Key`` → every value it is given (systemd allows repeats), comments and sections ignored."""
    out: dict[str, list[str]] = {}
    for line in path.read_text().splitlines():
        line = line.strip()
        if not line or line.startswith(("#", ";", "[")):
            continue
        key, _, value = line.partition("=")
        out.setdefault(key.strip(), []).append(value.strip())
    return out


def runnable(text: str) -> str:
    """The unit with ExecStart= pointed at this Python (verify needs the binary to exist)."""
    out = text.replace("ExecStart=/usr/local/bin/listenpost ", f"ExecStart={sys.executable} -m listenpost ")
    assert out != text, "ExecStart no longer points at /usr/local/bin/listenpost"
    return out


def verify(unit: Path, tmp_path: Path) -> subprocess.CompletedProcess[str]:
    # Beside copies of the others: the units name each other in After=/Wants=.
    for other in UNITS.glob("*.service"):
        if other.name != unit.name and not (tmp_path / other.name).exists():
            (tmp_path / other.name).write_text(runnable(other.read_text()))
    copy = tmp_path / unit.name
    copy.write_text(runnable(unit.read_text()))
    return subprocess.run(
        [ANALYZE, "verify", "--man=no", str(copy)], capture_output=True, text=True, timeout=60
    )


ALL = ["listenpost-agent.service", "listenpost-enroll.service", "listenpost-collector.service"]


@pytest.mark.parametrize("name", ALL)
def test_unit_verifies_without_errors_or_warnings(name, tmp_path):
    r = verify(UNITS / name, tmp_path)
    assert r.returncode == 0, r.stderr
    assert r.stderr == "" and r.stdout == ""


def test_a_warning_is_caught_by_the_stderr_check(tmp_path):
    """Anti-vacuity: an unknown key only warns (exit 0), and this suite's check sees it."""
    bad = tmp_path / "src" / "listenpost-agent.service"
    bad.parent.mkdir()
    bad.write_text(
        (UNITS / "listenpost-agent.service").read_text().replace("[Service]\n", "[Service]\nBogus=1\n")
    )
    r = verify(bad, tmp_path)
    assert r.returncode == 0 and "Bogus" in r.stderr


def test_agent_unit_contract():
    d = directives(UNITS / "listenpost-agent.service")
    assert d["Type"] == ["notify"] and d["NotifyAccess"] == ["main"]
    assert int(d["WatchdogSec"][0]) > 0 and d["Restart"] == ["on-failure"] and d["RestartSec"]
    # Scanning does not wait for the network (the agent spools); it waits for enrollment, if any.
    after = set(d["After"][0].split())
    assert {"bluetooth.target", "listenpost-enroll.service"} <= after
    assert "network-online.target" not in after and "Wants" not in d
    assert d["ConditionPathExists"] == ["/var/lib/listenpost/agent/agent.yaml"]
    assert (
        d["ProtectSystem"] == ["strict"] and d["NoNewPrivileges"] == ["true"] and d["PrivateTmp"] == ["true"]
    )
    assert d["StateDirectory"] == ["listenpost/agent"]
    assert d["CapabilityBoundingSet"] == ["CAP_NET_RAW"]
    assert set(d["RestrictAddressFamilies"][0].split()) == {
        "AF_UNIX",
        "AF_INET",
        "AF_INET6",
        "AF_BLUETOOTH",
        "AF_NETLINK",
    }
    # CAP_NET_RAW is granted only to boards with the raw HCI source: commented out, explained beside it.
    assert "AmbientCapabilities" not in d
    text = (UNITS / "listenpost-agent.service").read_text()
    assert "#AmbientCapabilities=CAP_NET_RAW" in text and "raw HCI source" in text
    assert d["ExecStart"][0].endswith("agent run --config /var/lib/listenpost/agent/agent.yaml")


def test_enroll_unit_contract():
    """Runs once (until agent.yaml exists), before the agent; a refused code or a give-up is final."""
    from listenpost.agent.client.enroll import EXIT_CODES, EnrollStatus

    d = directives(UNITS / "listenpost-enroll.service")
    assert d["Type"] == ["oneshot"] and d["TimeoutStartSec"] == ["infinity"]
    assert d["ConditionPathExists"] == ["!/var/lib/listenpost/agent/agent.yaml"]
    assert "listenpost-agent.service" in d["Before"][0] and "listenpost-agent.service" in " ".join(d["Wants"])
    assert d["Also"] == ["listenpost-agent.service"]
    final = {EXIT_CODES[s] for s in (EnrollStatus.CODE_EXPIRED, EnrollStatus.CODE_USED, EnrollStatus.GAVE_UP)}
    assert final == {int(v) for v in d["RestartPreventExitStatus"][0].split()}
    assert EXIT_CODES[EnrollStatus.UNREACHABLE] not in final  # a crash (exit 1) is restarted
    assert d["Restart"] == ["on-failure"] and d["StartLimitBurst"]
    start = d["ExecStart"][0]
    assert (
        "agent enroll --collector ${LISTENPOST_COLLECTOR} --code-file %d/enroll-code --until-enrolled"
        in start
    )
    assert d["LoadCredential"] == ["enroll-code:/etc/listenpost/enroll-code"]
    assert d["User"] == ["listenpost"] and d["CapabilityBoundingSet"] == [""]


def test_agent_unit_with_the_hci_capability_enabled_still_verifies(tmp_path):
    hci = tmp_path / "src" / "listenpost-agent.service"
    hci.parent.mkdir()
    hci.write_text(
        (UNITS / "listenpost-agent.service")
        .read_text()
        .replace("#AmbientCapabilities=", "AmbientCapabilities=")
    )
    r = verify(hci, tmp_path)
    assert r.returncode == 0 and r.stderr == ""


def test_collector_unit_contract():
    d = directives(UNITS / "listenpost-collector.service")
    assert d["Type"] == ["notify"] and int(d["WatchdogSec"][0]) > 0 and d["Restart"] == ["on-failure"]
    assert d["ProtectSystem"] == ["strict"] and d["NoNewPrivileges"] == ["true"]
    assert d["StateDirectory"] == ["listenpost/collector"]
    assert d["AmbientCapabilities"] == [""] and d["CapabilityBoundingSet"] == [""]
    text = (UNITS / "listenpost-collector.service").read_text()
    assert "bluetooth" not in text.lower()
    # collector.yaml decides where it listens and which database it uses: nothing in argv overrides it.
    start = d["ExecStart"][0]
    assert start.endswith(
        "collector serve --state-dir /var/lib/listenpost/collector --config /etc/listenpost/collector.yaml"
    )
    assert "--host" not in start and "--port" not in start and "--db" not in start
    assert d["EnvironmentFile"] == ["-/etc/listenpost/collector.env"]
    assert "#LoadCredential=db_url:/etc/listenpost/db_url" in text


def test_collector_unit_with_the_database_credential_enabled_still_verifies(tmp_path):
    src = tmp_path / "src" / "listenpost-collector.service"
    src.parent.mkdir()
    src.write_text(
        (UNITS / "listenpost-collector.service").read_text().replace("#LoadCredential=", "LoadCredential=")
    )
    r = verify(src, tmp_path)
    assert r.returncode == 0 and r.stderr == ""


def test_the_service_account_comes_from_sysusers(tmp_path):
    """Every unit runs as an account the sysusers.d file creates (systemd-sysusers into a scratch root)."""
    sysusers = require_tool("systemd-sysusers")
    conf = UNITS / "listenpost-sysusers.conf"
    users = {directives(UNITS / n)["User"][0] for n in ALL}
    assert users == {"listenpost"}
    (tmp_path / "etc").mkdir()
    r = subprocess.run(
        [sysusers, f"--root={tmp_path}", str(conf)], capture_output=True, text=True, timeout=60
    )
    assert r.returncode == 0, r.stderr
    passwd = {
        line.split(":")[0]: line.split(":") for line in (tmp_path / "etc/passwd").read_text().splitlines()
    }
    assert passwd["listenpost"][6] == "/usr/sbin/nologin"
    assert "listenpost" in {line.split(":")[0] for line in (tmp_path / "etc/group").read_text().splitlines()}


MAX_EXPOSURE = 2.5


def exposure(unit: Path) -> float:
    r = subprocess.run(
        [ANALYZE, "security", "--offline=true", "--no-pager", str(unit)],
        capture_output=True,
        text=True,
        timeout=60,
    )
    m = re.search(r"Overall exposure level for \S+: (\d+\.\d+)", r.stdout)
    assert m, r.stdout + r.stderr
    return float(m.group(1))


@pytest.mark.parametrize("name", ALL)
def test_unit_exposure_is_at_most_2_5(name, tmp_path):
    """`systemd-analyze security --offline=true` (systemd 252) scores 0 (locked down) to 10 (exposed)."""
    copy = tmp_path / name
    copy.write_text(runnable((UNITS / name).read_text()))
    assert exposure(copy) <= MAX_EXPOSURE


def test_the_exposure_check_sees_a_loosened_unit(tmp_path):
    """Anti-vacuity: the same unit without its sandbox scores far above the bar."""
    text = runnable((UNITS / "listenpost-collector.service").read_text())
    loose = "\n".join(
        line for line in text.splitlines() if line.startswith(("[", "ExecStart", "Type", "User"))
    )
    copy = tmp_path / "listenpost-collector.service"
    copy.write_text(loose + "\n")
    assert exposure(copy) > 5
