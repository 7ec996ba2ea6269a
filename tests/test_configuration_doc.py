"""docs/configuration.md against the settings code: every key the parsers read has its row, and no other."""

from __future__ import annotations

import dataclasses
import json
import re
from pathlib import Path

import pytest

from listenpost.agent.config import parse_agent_config
from listenpost.collector.config import parse_settings
from listenpost.collector.models.liveness import LivenessSettings
from listenpost.core.errors import ConfigError
from listenpost.core.settings import REQUIRED, KeyRead, recording

DOC = Path(__file__).resolve().parents[1] / "docs" / "configuration.md"
RULE = {"name": "lpx", "company_id": 0xFFFF, "prefix": "4c50", "offset": 2, "length": 4}


def agent_reads() -> list[KeyRead]:
    with recording() as reads:
        parse_agent_config({"board": "g0-a", "decode": {"rules": [RULE]}})
    return reads


def collector_reads() -> list[KeyRead]:
    # liveness keys are read only when present: give each its built-in value
    every = {f.name: getattr(LivenessSettings(), f.name) for f in dataclasses.fields(LivenessSettings)}
    with recording() as reads:
        parse_settings({"decode": {"rules": [RULE]}, "liveness": every})
    return reads


def row(r: KeyRead) -> tuple[str, str, str]:
    default = r.default if r.default is REQUIRED else f"`{json.dumps(r.default)}`"
    return f"`{r.path}`", " or ".join(r.kinds), default


def documented(section: str) -> dict[str, tuple[str, str, str, str]]:
    text = DOC.read_text(encoding="utf-8")
    body = re.split(r"^## ", text, flags=re.M)
    part = next(b for b in body if b.startswith(section))
    rows = {}
    for line in part.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split(" | ")]
        if line.startswith("| `") and len(cells) == 4:
            rows[cells[0]] = tuple(cells)
    return rows


@pytest.mark.parametrize(
    ("section", "reads"), [("1. agent.yaml", agent_reads), ("2. collector.yaml", collector_reads)]
)
def test_every_key_read_is_documented_with_its_type_and_default(section, reads):
    have = documented(section)
    want = {row(r)[0]: row(r) for r in reads()}
    assert len(want) > 20
    problems = [f"missing row: | {' | '.join(w)} | <meaning> |" for k, w in want.items() if k not in have]
    problems += [
        f"row differs: {have[k][:3]} != code {w}" for k, w in want.items() if k in have and have[k][:3] != w
    ]
    problems += [f"documented but never read: {k}" for k in have if k not in want]
    problems += [f"{k}: no meaning" for k, cells in have.items() if len(cells[3]) < 10]
    assert not problems, "\n".join(problems)


def test_a_typo_is_an_error_not_a_silent_default():
    """Anti-vacuity for the reference: a key the reader does not know is refused, naming it."""
    with pytest.raises(ConfigError, match=r"agent.yaml: uplink.backof_max_seconds: unknown key"):
        parse_agent_config({"board": "g0-a", "uplink": {"backof_max_seconds": 5}})
    with pytest.raises(ConfigError, match=r"collector.yaml: liveness.silent_phy: unknown key"):
        parse_settings({"liveness": {"silent_phy": 8}})


def test_an_integer_liveness_setting_accepts_an_integer():
    """collector.yaml ``liveness: {phi_window: 50}`` is an int setting and stays one."""
    assert parse_settings({"liveness": {"phi_window": 50, "late_phi": 2}}).liveness == {
        "phi_window": 50,
        "late_phi": 2.0,
    }
