"""``listenpost agent check-config`` prints the file in agent.yaml's own keys, every default filled in."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from listenpost.agent.config import load_agent_config, parse_agent_config
from listenpost.cli import main

FULL = {
    "board": "g0-a",
    "state_dir": "state",
    "collector": {"url": "http://10.20.0.2:8470", "timeout_seconds": 7.5},
    "source": {"kind": "hci", "adapter": "hci1", "stall_seconds": 30},
    "tags": {"file": "tags.txt"},
    "decode": {"rules": [{"name": "lpx", "company_id": 0xFFFF, "prefix": "4c50", "offset": 2, "length": 4}]},
    "calibration": {"offset_db": -3.5},
    "spool": {"max_bytes": 1048576, "flush_seconds": 4},
    "uplink": {"max_batch_readings": 1000},
    "heartbeat": {"period_seconds": 15},
    "log": {"format": "json", "level": "debug"},
}


def test_check_config_prints_yaml_keys_that_read_back_to_the_same_config(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "agent.yaml"
    path.write_text(yaml.safe_dump(FULL))
    assert main(["agent", "check-config", str(path)]) == 0
    shown = json.loads(capsys.readouterr().out)
    # The sections and keys a person writes, not the program's field names.
    assert set(shown) <= set(FULL) | {"state_dir"}
    assert shown["tags"] == {"file": "tags.txt"} and shown["heartbeat"] == {"period_seconds": 15.0}
    assert shown["calibration"] == {"offset_db": -3.5} and shown["log"] == {
        "format": "json",
        "level": "debug",
    }
    assert shown["decode"]["rules"][0]["prefix"] == "4c50"
    # What it prints is itself a valid agent.yaml meaning the same thing.
    again = parse_agent_config(shown, origin=str(path), base_dir=tmp_path)
    assert again == load_agent_config(path)
