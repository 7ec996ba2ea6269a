"""
The wheelhouse: the agent and its dependencies as wheels for the boards' platform, served read-only.

A venue network often has no internet, so a board's first boot installs the agent from the collector
instead of a public index: ``pip install --no-index --find-links <collector>/wheels/ listenpost``.
``listenpost collector wheelhouse build`` fills ``<state_dir>/wheels`` with ``pip download
--only-binary=:all: --platform ... --python-version ...``, so nothing is compiled on a board; the
collector serves the folder's ``*.whl`` files and an HTML index of them (the page ``--find-links``
reads, as pip's documentation of that option describes).
"""

from __future__ import annotations

import html
import os
import re
import shutil
import subprocess
import sys
import tempfile
from collections.abc import Sequence
from importlib import metadata
from pathlib import Path

from aiohttp import web

from listenpost.collector.http.middlewares import ApiError
from listenpost.collector.state import SETTINGS
from listenpost.core.errors import ConfigError, ListenpostError

WHEELS_DIR = "wheels"
"""The wheelhouse's folder inside the collector's state directory."""


def manylinux_platforms(arch: str, glibc: tuple[int, int] = (2, 36)) -> tuple[str, ...]:
    """
    Every manylinux tag a system with this glibc runs (PEP 600), spelled out: with ``--platform``,
    pip matches the tags given and does not widen ``manylinux_2_36`` to the older ones (pip 26).
    """
    major, minor = glibc
    return (f"manylinux2014_{arch}", *(f"manylinux_{major}_{m}_{arch}" for m in range(17, minor + 1)))


DEFAULT_PLATFORMS = manylinux_platforms("aarch64")
"""A 64-bit board on Debian 12 / Raspberry Pi OS 12 (glibc 2.36)."""
DEFAULT_PYTHON = "3.11"
"""Debian 12's Python."""

PIP_TIMEOUT_S = 900.0
_WHEEL_NAME = re.compile(r"^[A-Za-z0-9_.+!-]+\.whl$")
_NO_WHEEL = re.compile(
    r"(?:Could not find a version that satisfies the requirement|No matching distribution found for) (\S+)"
)


class WheelhouseError(ListenpostError):
    """pip could not fill the wheelhouse."""


def wheel_dir(state_dir: str | Path) -> Path:
    return Path(state_dir) / WHEELS_DIR


def _pip(args: Sequence[str], timeout_s: float) -> subprocess.CompletedProcess[str]:
    try:
        return subprocess.run(
            [sys.executable, "-m", "pip", "--disable-pip-version-check", *args],
            capture_output=True,
            text=True,
            timeout=timeout_s,
            check=False,
        )
    except subprocess.TimeoutExpired as e:
        raise WheelhouseError(f"pip {args[0]} did not finish within {timeout_s:g} s") from e


def _checkout_root() -> Path | None:
    """The source tree this listenpost runs from, when it is a checkout (an editable install)."""
    import listenpost

    root = Path(listenpost.__file__).resolve().parent.parent
    return root if (root / "pyproject.toml").is_file() and (root / "agent").is_dir() else None


def _agent_wheel(into: Path, wheel: Path | None, timeout_s: float) -> Path:
    """listenpost's own wheel: the one given, else built from this checkout, else this version's."""
    if wheel is not None:
        if not wheel.is_file() or wheel.suffix != ".whl":
            raise ConfigError(f"--wheel: {wheel}: not a wheel file")
        shutil.copy2(wheel, into / wheel.name)
        return into / wheel.name
    root = _checkout_root()
    if root is not None:
        r = _pip(["wheel", "--no-deps", "--quiet", "--wheel-dir", str(into), str(root)], timeout_s)
        what = f"building the listenpost wheel from {root}"
    else:
        spec = f"listenpost=={metadata.version('listenpost')}"
        r = _pip(["download", "--no-deps", "--only-binary=:all:", "--dest", str(into), spec], timeout_s)
        what = f"downloading {spec}"
    if r.returncode != 0:
        raise WheelhouseError(f"{what} failed:\n{r.stderr.strip()[-2000:]}")
    found = sorted(into.glob("listenpost-*.whl"))
    if not found:
        raise WheelhouseError(f"{what} left no listenpost wheel")
    return found[-1]


def build_wheelhouse(
    dest: str | Path,
    *,
    platforms: Sequence[str] = DEFAULT_PLATFORMS,
    python_version: str = DEFAULT_PYTHON,
    wheel: Path | None = None,
    timeout_s: float = PIP_TIMEOUT_S,
) -> list[Path]:
    """
    Fill ``dest`` with listenpost's wheel and wheels of every dependency of the agent (the base
    install, no extras) for ``platforms`` and ``python_version``. Built beside ``dest`` and swapped in
    whole: a failed build leaves the previous wheelhouse as it was.

    Raises:
        ConfigError: a bad platform or Python version, or ``wheel`` is not a wheel.
        WheelhouseError: pip failed; a dependency without a wheel for the platform is named.
    """
    if not re.fullmatch(r"3\.\d{1,2}", python_version):
        raise ConfigError(f"--python-version: must look like 3.11, got {python_version!r}")
    for p in platforms:
        if not re.fullmatch(r"[a-z0-9_]+", p):
            raise ConfigError(f"--platform: must be a platform tag like manylinux2014_aarch64, got {p!r}")
    shown = platforms[0] if len(platforms) == 1 else f"{platforms[0]} (and {len(platforms) - 1} more tags)"
    target = Path(dest)
    target.parent.mkdir(parents=True, exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix=f".{target.name}-", dir=target.parent))
    try:
        own = _agent_wheel(work, wheel, timeout_s)
        args = ["download", "--only-binary=:all:", "--dest", str(work), "--implementation", "cp"]
        args += ["--python-version", python_version]
        for p in platforms:
            args += ["--platform", p]
        r = _pip([*args, str(own)], timeout_s)
        if r.returncode != 0:
            m = _NO_WHEEL.search(r.stderr)
            if m:
                raise WheelhouseError(
                    f"no wheel of {m.group(1)} for Python {python_version} on {shown}: "
                    "a board cannot compile it, so the wheelhouse would be incomplete. Choose the "
                    "boards' platform with --platform (see 'pip debug --verbose' on a board), or give "
                    "the boards a --package they can install otherwise"
                )
            raise WheelhouseError(f"pip download failed:\n{r.stderr.strip()[-2000:]}")
        old = target.with_name(f".{target.name}.old")
        shutil.rmtree(old, ignore_errors=True)
        if target.exists():
            os.replace(target, old)
        os.replace(work, target)
        shutil.rmtree(old, ignore_errors=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return sorted(target.glob("*.whl"))


# ------------------------------------------------------------------ serving


async def _index(request: web.Request) -> web.Response:
    folder = wheel_dir(request.app[SETTINGS].state_dir)
    if not folder.is_dir():
        raise ApiError(
            404,
            "no_wheelhouse",
            "no wheelhouse on this collector; run 'listenpost collector wheelhouse build'",
        )
    links = "\n".join(
        f'<a href="{html.escape(p.name)}">{html.escape(p.name)}</a><br>'
        for p in sorted(folder.glob("*.whl"))
        if p.is_file()
    )
    page = f"<!DOCTYPE html>\n<html><head><title>listenpost wheels</title></head><body>\n{links}\n</body></html>\n"
    return web.Response(text=page, content_type="text/html")


async def _wheel(request: web.Request) -> web.StreamResponse:
    name = request.match_info["name"]
    path = wheel_dir(request.app[SETTINGS].state_dir) / name
    # Only a plain file name of a wheel in the folder itself: no path, no other file of the state dir.
    if not _WHEEL_NAME.fullmatch(name) or not path.is_file():
        raise ApiError(404, "not_found", f"no wheel named {name!r} here", field="name")
    return web.FileResponse(path, headers={"Content-Type": "application/octet-stream"})


def add_routes(app: web.Application) -> None:
    """GET only: the wheelhouse is public (a board has no credential before it is installed)."""
    app.router.add_get("/wheels/", _index)
    app.router.add_get("/wheels/{name}", _wheel)
