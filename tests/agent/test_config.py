"""agent.yaml validation: every error names the file, the key path and the value."""

from __future__ import annotations

from pathlib import Path

import pytest

from listenpost.agent.config import load_agent_config, parse_agent_config
from listenpost.core.errors import ConfigError

GOOD = """
board: g0-a
state_dir: state
collector: {url: "http://127.0.0.1:8470/", timeout_seconds: 5}
source: {kind: replay, files: [a.jsonl.gz], speed: 0}
decode:
  rules:
    - {name: lpx, company_id: 0xFFFF, prefix: "4c50", offset: 2, length: 4}
calibration: {offset_db: -2.5}
spool: {flush_seconds: 5}
uplink: {backoff_max_seconds: 30}
heartbeat: {period_seconds: 10}
"""


def test_good_config_loads_with_paths_resolved(tmp_path: Path) -> None:
    """Relative state_dir resolves against the file's folder; hex and URL are normalised."""
    f = tmp_path / "agent.yaml"
    f.write_text(GOOD)
    cfg = load_agent_config(f)
    assert cfg.board == "g0-a"
    assert cfg.state_dir == str(tmp_path / "state")
    assert cfg.collector.url == "http://127.0.0.1:8470"
    assert cfg.rules[0].company_id == 0xFFFF and cfg.rules[0].prefix == b"LP"
    assert cfg.offset_db == -2.5
    assert cfg.state_path(cfg.spool.path) == tmp_path / "state" / "spool.sqlite"


@pytest.mark.parametrize(
    ("patch", "message"),
    [
        ({"uplink": {"backoff_max_seconds": -1}}, "uplink.backoff_max_seconds: must be > 0, got -1"),
        (
            {"source": {"kind": "radio"}},
            "source.kind: must be one of bleak, hci, replay, btsnoop, got 'radio'",
        ),
        ({"source": {"kind": "replay"}}, "source.files: source.kind 'replay' needs at least one file"),
        ({"spool": {"flush_secs": 5}}, "spool.flush_secs: unknown key"),
        ({"board": "G0 A"}, "board: must be 1-63 lower-case"),
        ({"collector": {"url": "ftp://x"}}, "collector.url: must be an http(s) URL"),
        ({"calibration": {"offset_db": "high"}}, "calibration.offset_db: must be float, got 'high'"),
        (
            {"decode": {"rules": [{"name": "x", "company_id": 1, "service_uuid16": 2}]}},
            "decode.rules[0].company_id: give exactly one of company_id or service_uuid16",
        ),
        (
            {"decode": {"rules": [{"name": "x", "company_id": 1, "prefix": "zz"}]}},
            "decode.rules[0].prefix: must be hex bytes, got 'zz'",
        ),
    ],
)
def test_bad_values_name_the_key_path(patch: dict, message: str) -> None:
    """Each mistake is reported with its full key path."""
    data = {"board": "g0-a", "source": {"kind": "bleak"}} | patch
    with pytest.raises(ConfigError) as e:
        parse_agent_config(data, origin="agent.yaml")
    assert str(e.value).startswith("agent.yaml: ")
    assert message in str(e.value)


def test_yaml_syntax_error_names_file_and_line(tmp_path: Path) -> None:
    """A YAML syntax error says which file and line."""
    f = tmp_path / "agent.yaml"
    f.write_text("board: g0-a\nsource: {kind: bleak\n")
    with pytest.raises(ConfigError, match=r"agent\.yaml: line \d+: not valid YAML"):
        load_agent_config(f)


def test_check_config_cli_exit_codes(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """`listenpost agent check-config` exits 0 on a good file and 2 with the key path on a bad one."""
    from listenpost.cli import main

    good = tmp_path / "good.yaml"
    good.write_text(GOOD)
    assert main(["agent", "check-config", str(good)]) == 0
    bad = tmp_path / "bad.yaml"
    bad.write_text("board: g0-a\nuplink: {backoff_max_seconds: -1}\n")
    assert main(["agent", "check-config", str(bad)]) == 2
    assert "uplink.backoff_max_seconds: must be > 0, got -1" in capsys.readouterr().err
