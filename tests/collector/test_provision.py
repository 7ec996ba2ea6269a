"""The provisioning bundle: cloud-init accepts its user-data, and the agent accepts its config."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
import yaml

from listenpost.agent.config import parse_agent_config
from listenpost.collector.provision import build_bundle, write_bundle
from tests.conftest import require_tool

CLOUD_INIT = shutil.which("cloud-init")
needs_cloud_init = pytest.mark.usefixtures("_cloud_init")


@pytest.fixture
def _cloud_init() -> None:
    require_tool("cloud-init")


def _bundle(tmp_path: Path) -> Path:
    out = tmp_path / "card"
    write_bundle(
        out,
        board="u4-b",
        room="U4 Changing Hall",
        floor="upper",
        code="7KQ2-M9XD-4TPA-WZ3R",
        collector_url="http://10.20.0.2:8470/",
        expires_at=1_800_259_200.0,
    )
    return out


def _schema(path: Path) -> subprocess.CompletedProcess[str]:
    # docs/references.md §9: `cloud-init schema -c FILE` (cloud-init 22.4) exits 0 for a valid cloud-config, 1 otherwise.
    return subprocess.run([CLOUD_INIT, "schema", "-c", str(path)], capture_output=True, text=True, timeout=60)


@needs_cloud_init
def test_user_data_passes_cloud_init_schema(tmp_path):
    out = _bundle(tmp_path)
    r = _schema(out / "user-data")
    assert r.returncode == 0, r.stderr
    assert "Valid cloud-config" in r.stdout


@needs_cloud_init
def test_a_broken_user_data_fails_the_same_check(tmp_path):
    out = _bundle(tmp_path)
    doc = yaml.safe_load((out / "user-data").read_text())
    doc["runcmd"] = "not-a-list"
    doc["write_files"][0]["permissions"] = 644
    bad = tmp_path / "bad-data"
    bad.write_text("#cloud-config\n" + yaml.safe_dump(doc))
    r = _schema(bad)
    assert r.returncode == 1
    assert "runcmd" in r.stderr and "permissions" in r.stderr


def test_bundle_contents(tmp_path):
    out = _bundle(tmp_path)
    assert sorted(p.name for p in out.iterdir()) == ["README.txt", "agent.yaml", "meta-data", "user-data"]
    assert all(p.stat().st_mode & 0o077 == 0 for p in out.iterdir())  # the code is on the card: owner only
    doc = yaml.safe_load((out / "user-data").read_text())
    assert doc["hostname"] == "u4-b"
    enroll = next(c for c in doc["runcmd"] if "enroll" in c)
    i = enroll.index("agent")
    assert enroll[i : i + 6] == [
        "agent",
        "enroll",
        "--collector",
        "http://10.20.0.2:8470",
        "--code",
        "7KQ2-M9XD-4TPA-WZ3R",
    ]
    assert doc["runcmd"][-1] == ["systemctl", "enable", "--now", "listenpost-agent.service"]
    unit = doc["write_files"][0]["content"]
    assert "ExecStart=/opt/listenpost/bin/listenpost agent run" in unit
    meta = yaml.safe_load((out / "meta-data").read_text())
    assert meta["local-hostname"] == "u4-b" and meta["instance-id"].startswith("listenpost-u4-b-")
    cfg = parse_agent_config(yaml.safe_load((out / "agent.yaml").read_text()), origin="agent.yaml")
    assert (cfg.board, cfg.collector.url) == ("u4-b", "http://10.20.0.2:8470")


def test_two_bundles_for_one_board_get_distinct_instance_ids():
    a = build_bundle(
        board="g0-a", room="G0 Foyer", floor=None, code="A", collector_url="http://c:8470", expires_at=0
    )
    b = build_bundle(
        board="g0-a", room="G0 Foyer", floor=None, code="B", collector_url="http://c:8470", expires_at=0
    )
    # A re-flashed card must look new to cloud-init, or it skips the first-boot modules.
    assert yaml.safe_load(a["meta-data"])["instance-id"] != yaml.safe_load(b["meta-data"])["instance-id"]


@needs_cloud_init
def test_package_spec_reaches_pip_and_the_user_data_stays_valid(tmp_path):
    """--package goes to pip as one argument; the bundle says which and when the code expires, in UTC."""
    out = tmp_path / "card"
    wheel = "https://files.brackenford.example/listenpost-0.1.0-py3-none-any.whl"
    write_bundle(
        out,
        board="g0-a",
        room="G0 Foyer",
        floor=None,
        code="7KQ2-M9XD-4TPA-WZ3R",
        collector_url="http://10.20.0.2:8470",
        expires_at=1_800_259_200.0,
        package=wheel,
    )
    doc = yaml.safe_load((out / "user-data").read_text())
    assert ["/opt/listenpost/bin/pip", "install", "--upgrade", wheel] in doc["runcmd"]
    # 1 800 259 200 s after the Unix epoch = 20 836 days + 8 h = 2027-01-18 08:00 UTC (checked with GNU
    # `date -u -d @1800259200`, independent of the code under test).
    assert "expires 2027-01-18 08:00 UTC" in (out / "user-data").read_text()
    assert (
        wheel in (out / "README.txt").read_text()
        and "2027-01-18 08:00 UTC" in (out / "README.txt").read_text()
    )
    assert _schema(out / "user-data").returncode == 0


def test_default_package_is_this_version_and_a_spaced_one_is_refused():
    from importlib.metadata import version

    from listenpost.collector.provision import package_spec
    from listenpost.core.errors import ConfigError

    assert package_spec(None) == f"listenpost=={version('listenpost')}"
    assert package_spec("  listenpost>=0.1 ") == "listenpost>=0.1"
    with pytest.raises(ConfigError, match="--package"):
        package_spec("listenpost --index-url http://evil")
