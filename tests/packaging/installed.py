"""
A wheel of this checkout and fresh virtual environments made from it (not editable), for the packaging
tests and the footprint benchmark: what a board or a collector machine really gets from ``pip install``.
"""

from __future__ import annotations

import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PIP_TIMEOUT_S = 900


def build_wheel(outdir: Path) -> Path:
    """``python -m build --wheel`` in an isolated build environment, as a packager would run it."""
    outdir.mkdir(parents=True, exist_ok=True)
    proc = subprocess.run(
        [sys.executable, "-m", "build", "--wheel", "--outdir", str(outdir), str(ROOT)],
        capture_output=True,
        text=True,
        timeout=PIP_TIMEOUT_S,
        check=False,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"wheel build failed:\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}")
    (wheel,) = outdir.glob("listenpost-*.whl")
    return wheel


def make_env(path: Path, wheel: Path, extra: str | None = None) -> Path:
    """A fresh venv at ``path`` with the wheel (and ``extra``) installed; returns its ``bin`` folder."""
    venv.create(path, with_pip=True, clear=True)
    bin_dir = path / "bin"
    spec = f"{wheel}[{extra}]" if extra else str(wheel)
    proc = subprocess.run(
        [str(bin_dir / "python"), "-m", "pip", "install", "--quiet", "--disable-pip-version-check", spec],
        capture_output=True,
        text=True,
        timeout=PIP_TIMEOUT_S,
        check=False,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"pip install {spec} failed:\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}")
    return bin_dir


def package_data(bin_dir: Path, package: str) -> Path:
    """Where an installed package's data files are, asked of the environment's own Python."""
    out = subprocess.run(
        [str(bin_dir / "python"), "-c", f"from importlib.resources import files; print(files({package!r}))"],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
        cwd=bin_dir,
    ).stdout.strip()  # not the checkout, whose listenpost/ would shadow it
    return Path(out)


def size_on_disk(path: Path) -> int:
    """Bytes of every regular file under ``path`` (what the environment costs on a card)."""
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file() and not p.is_symlink())
