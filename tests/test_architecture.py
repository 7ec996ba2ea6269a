"""
The import graph, checked by import-linter's contracts in pyproject.toml.

The source folders (agent/, collector/, ...) become one `listenpost` namespace only when installed, so
grimp, which walks the package's folder, reads a copy laid out as the wheel lays it out.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LINT = Path(sys.executable).with_name("lint-imports")


def installed_layout(dest: Path) -> Path:
    """Copy the Python files of every mapped package folder to where the wheel puts them."""
    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    # longest package name last, so a sub-package mapped to its own folder lands over its parent's copy
    for package, folder in sorted(cfg["package-dir"].items(), key=lambda kv: kv[0].count(".")):
        target = dest.joinpath(*package.split("."))
        shutil.copytree(
            ROOT / folder,
            target,
            dirs_exist_ok=True,
            ignore=shutil.ignore_patterns("__pycache__", "*.gz", "*.json", "templates"),
        )
    shutil.copy(ROOT / "pyproject.toml", dest / "pyproject.toml")
    return dest


def lint(tree: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    return subprocess.run(
        [str(LINT), "--config", str(tree / "pyproject.toml"), "--no-cache"],
        cwd=tree,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )


def test_every_package_folder_is_listed_for_the_wheel():
    cfg = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    on_disk = set()
    for package, folder in cfg["package-dir"].items():
        for init in (ROOT / folder).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / folder).parts
            on_disk.add(".".join((package, *rel)))
    assert on_disk == set(cfg["packages"])


def test_the_import_contracts_hold(tmp_path):
    result = lint(installed_layout(tmp_path))
    assert result.returncode == 0, result.stdout + result.stderr
    assert "5 kept, 0 broken" in result.stdout


@pytest.mark.parametrize(
    ("module", "line", "contract"),
    [
        (
            "core/_probe.py",
            "import listenpost.agent.config",
            "the shared core imports no part of the product",
        ),
        (
            "agent/_probe.py",
            "import listenpost.collector.store",
            "agent and collector never import each other",
        ),
        (
            "collector/_probe.py",
            "import listenpost.agent.spool",
            "agent and collector never import each other",
        ),
        ("agent/_probe.py", "import numpy", "the agent and the core need nothing the collector alone needs"),
        ("agent/pipeline/filter.py", "import listenpost.agent.spool", "pure pipeline stages do no I/O"),
        (
            # A test-only library used by collector code works in the checkout and fails in the wheel.
            "collector/models/_probe.py",
            "def f():\n    from scipy.special import log_ndtr",
            "the collector, simulator and demo need nothing beyond their extras",
        ),
    ],
)
def test_a_broken_contract_fails_the_check(tmp_path, module, line, contract):
    tree = installed_layout(tmp_path)
    path = tree / "listenpost" / module
    path.write_text((path.read_text() if path.exists() else "") + f"\n{line}\n")
    result = lint(tree)
    assert result.returncode != 0
    assert f"{contract} BROKEN" in result.stdout
