"""
The wheel as users install it: an agent-only environment for a board and one with the ``collector`` extra,
both fresh virtual environments made from the built wheel (not the editable checkout).

Agent only: ``--version``, ``agent check-config`` and dry-run replays of a recording and of a btsnoop
capture work, their output equals the checkout's, and nothing the collector alone needs is importable.
With the extra: serve, tags import, ``board add --bundle`` (the user-data passes ``cloud-init schema``),
``agent enroll``, a replay uploaded and every reading stored, and ``listenpost demo`` run to its summary.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import socket
import sqlite3
import subprocess
import sys
import threading
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest
import yaml

from tests.e2e.test_demo import check_demo_run
from tests.packaging.installed import build_wheel, make_env, package_data

ROOT = Path(__file__).resolve().parents[2]
RULES = json.loads((ROOT / "replay_logs" / "truth.json").read_text())["decode_rules"]
pytestmark = pytest.mark.timeout(1800)


def run(cmd: list[str | Path], **kw) -> subprocess.CompletedProcess[str]:
    kw.setdefault("timeout", 600)
    kw.setdefault("cwd", "/")  # away from the checkout, whose folders would shadow the installed package
    return subprocess.run([str(c) for c in cmd], capture_output=True, text=True, check=False, **kw)


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    return build_wheel(tmp_path_factory.mktemp("dist"))


@pytest.fixture(scope="module")
def agent_env(wheel, tmp_path_factory) -> Path:
    return make_env(tmp_path_factory.mktemp("agent-env") / "venv", wheel)


@pytest.fixture(scope="module")
def collector_env(wheel, tmp_path_factory) -> Path:
    return make_env(tmp_path_factory.mktemp("collector-env") / "venv", wheel, "collector")


def test_the_wheel_holds_one_namespace_and_its_package_data(wheel):
    import zipfile

    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/")[0] for n in names}
    assert tops == {"listenpost", f"{wheel.name.split('-')[0]}-{wheel.name.split('-')[1]}.dist-info"}
    for data in (
        "listenpost/systemd/listenpost-agent.service",
        "listenpost/systemd/listenpost-collector.service",
        "listenpost/systemd/listenpost-enroll.service",
        "listenpost/systemd/listenpost-sysusers.conf",
        "listenpost/replay_logs/truth.json",
        "listenpost/replay_logs/g0-a.btsnoop.gz",
        "listenpost/scenarios/brackenford.yaml",
        "listenpost/collector/web/templates/layout.html",
    ):
        assert data in names
    assert any(n.endswith("licenses/LICENSE") for n in names)


def test_agent_only_environment_runs_the_agent_and_holds_no_collector_dependency(agent_env, tmp_path):
    lp = agent_env / "listenpost"
    version = run([lp, "--version"])
    assert version.returncode == 0 and version.stdout.startswith("listenpost ")

    cfg = tmp_path / "agent.yaml"
    cfg.write_text(yaml.safe_dump({"board": "g0-a", "decode": {"rules": RULES}}))
    check = run([lp, "agent", "check-config", cfg])
    assert check.returncode == 0, check.stderr

    logs = package_data(agent_env, "listenpost.replay_logs")
    assert logs != ROOT / "replay_logs"  # the installed copy, not the checkout
    for recording in ("g0-a.jsonl.gz", "g0-a.btsnoop.gz"):
        argv = ["agent", "replay", "--dry-run", "--fast", "--config", cfg, "--tags"]
        installed = run([lp, *argv, logs / "tags.txt", logs / recording])
        checkout = run(
            [
                sys.executable,
                "-m",
                "listenpost",
                *argv,
                ROOT / "replay_logs" / "tags.txt",
                ROOT / "replay_logs" / recording,
            ]
        )
        assert installed.returncode == 0, installed.stderr[-2000:]
        assert installed.stdout.count("\n") > 1000
        assert installed.stdout == checkout.stdout

    for module in ("numpy", "asyncpg", "prometheus_client"):
        assert run([agent_env / "python", "-c", f"import {module}"]).returncode != 0, module
    refused = run([lp, "collector", "status"])
    assert refused.returncode == 2
    assert "pip install 'listenpost[collector]'" in refused.stderr and "Traceback" not in refused.stderr


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def serving(lp: Path, state: Path, config: Path) -> Iterator[str]:
    """A real `collector serve`, yielded once it logs ``collector_listening`` (logged after the bind)."""
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    argv = [str(lp), "collector", "serve", "--state-dir", str(state), "--config", str(config)]
    argv += ["--port", str(port), "--log-format", "json"]
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    seen: list[str] = []
    drain: threading.Thread | None = None
    try:
        assert proc.stdout is not None
        for line in proc.stdout:  # bounded by pytest-timeout; EOF if serve dies
            seen.append(line)
            if '"collector_listening"' in line:
                break
        else:
            raise AssertionError("collector serve exited before listening:\n" + "".join(seen)[-3000:])
        drain = threading.Thread(target=seen.extend, args=(proc.stdout,), daemon=True)
        drain.start()  # keeps the pipe from filling while the test runs
        with urllib.request.urlopen(url + "/v1/status", timeout=10) as answer:  # listening means answering
            answer.read()
        yield url
    finally:
        proc.terminate()
        proc.wait(timeout=60)
        if drain is not None:
            drain.join(timeout=60)  # EOF once the process is gone
        if proc.stdout is not None:
            proc.stdout.close()


def test_collector_extra_serves_enrolls_stores_a_replay_and_runs_the_demo(collector_env, tmp_path):
    lp = collector_env / "listenpost"
    logs = package_data(collector_env, "listenpost.replay_logs")
    state = tmp_path / "collector"
    config = tmp_path / "collector.yaml"
    config.write_text(yaml.safe_dump({"decode": {"rules": RULES}}))
    with serving(lp, state, config) as url:
        admin = ["--collector", url, "--state-dir", state]
        tags = run([lp, "collector", "tags", "import", logs / "tags.txt", *admin])
        assert tags.returncode == 0, tags.stderr

        bundle = tmp_path / "bundle"
        added = run(
            [
                lp,
                "collector",
                "board",
                "add",
                "g0-a",
                "--room",
                "G0 Foyer",
                "--floor",
                "ground",
                "--bundle",
                bundle,
                "--json",
                *admin,
            ]
        )
        assert added.returncode == 0, added.stderr
        code = json.loads(added.stdout)["code"]
        user_data = bundle / "user-data"
        assert "listenpost-agent.service" in user_data.read_text()
        if shutil.which("cloud-init"):
            schema = run(["cloud-init", "schema", "-c", user_data])
            assert schema.returncode == 0, schema.stdout + schema.stderr
        elif os.environ.get("LISTENPOST_REQUIRE_TOOLS"):
            pytest.fail("cloud-init is required (LISTENPOST_REQUIRE_TOOLS=1) but not installed")

        board_state = tmp_path / "board"
        enrolled = run(
            [lp, "agent", "enroll", "--collector", url, "--code", code, "--state-dir", board_state]
        )
        assert enrolled.returncode == 0, enrolled.stderr
        board_cfg = board_state / "agent.yaml"
        uploaded = run([lp, "agent", "replay", "--config", board_cfg, "--fast", logs / "g0-a.jsonl.gz"])
        assert uploaded.returncode == 0, uploaded.stderr[-3000:]
        expected = run(
            [
                lp,
                "agent",
                "replay",
                "--dry-run",
                "--fast",
                "--config",
                board_cfg,
                "--tags",
                logs / "tags.txt",
                logs / "g0-a.jsonl.gz",
            ]
        ).stdout.count("\n")
    with contextlib.closing(sqlite3.connect(f"file:{state / 'collector.sqlite'}?mode=ro", uri=True)) as db:
        (stored,) = db.execute(
            "SELECT count(*) FROM readings r JOIN boards b ON b.id = r.board_id WHERE b.name = 'g0-a'"
        ).fetchone()
    assert expected > 1000 and stored == expected

    # The test run's one run of the demo, as a user runs it from the wheel; tests/e2e/test_demo.py checks it.
    summary = tmp_path / "demo.json"
    demo = run([lp, "demo", "--state-dir", tmp_path / "demo", "--summary-json", summary], timeout=900)
    check_demo_run(demo, summary, tmp_path / "demo")
