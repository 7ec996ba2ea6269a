"""
What the operating system tells about the board: CPU temperature, free disk, uptime, identity.

Every reader returns ``None`` (or an empty value) where the OS does not expose the figure
(containers, non-Linux machines, boards without a thermal zone), never raises. ``root`` lets tests
point the readers at a fake ``/sys``/``/proc`` tree.
"""

from __future__ import annotations

import os
import socket
from dataclasses import dataclass
from pathlib import Path
from typing import Any

_ROOT = Path("/")


@dataclass(frozen=True, slots=True)
class BoardInfo:
    """A snapshot of the board's own health figures."""

    cpu_temperature_c: float | None
    """Hottest CPU/SoC thermal zone, degrees Celsius."""
    disk_free_bytes: int | None
    """Bytes available to this (unprivileged) process on the state directory's filesystem."""
    disk_total_bytes: int | None
    """Size of that filesystem, bytes."""
    uptime_s: float | None
    """Seconds since the kernel booted (``/proc/uptime``)."""
    load_1m: float | None
    """One-minute load average."""

    def as_dict(self) -> dict[str, Any]:
        return {
            "cpu_temperature_c": self.cpu_temperature_c,
            "disk_free_bytes": self.disk_free_bytes,
            "disk_total_bytes": self.disk_total_bytes,
            "uptime_s": self.uptime_s,
            "load_1m": self.load_1m,
        }


def _read(path: Path) -> str | None:
    try:
        return path.read_text().strip()
    except (OSError, UnicodeDecodeError):
        return None


def cpu_temperature_c(root: Path = _ROOT) -> float | None:
    """
    Temperature of the CPU, degrees Celsius, from ``/sys/class/thermal/thermal_zone*/temp``.

    The kernel reports millidegrees Celsius (common practice across thermal drivers). Zones whose
    ``type`` names the CPU or SoC are preferred; otherwise the hottest zone is taken, since a
    board's only zone is normally the SoC's.
    """
    zones = sorted((root / "sys/class/thermal").glob("thermal_zone*"))
    cpu: list[float] = []
    other: list[float] = []
    for z in zones:
        raw = _read(z / "temp")
        if raw is None:
            continue
        try:
            value = int(raw) / 1000.0
        except ValueError:
            continue
        # Drivers report -273 °C or absurd values for absent sensors; keep physically plausible ones.
        if not -40.0 <= value <= 150.0:
            continue
        kind = (_read(z / "type") or "").lower()
        (cpu if any(k in kind for k in ("cpu", "soc", "x86_pkg")) else other).append(value)
    pool = cpu or other
    return max(pool) if pool else None


def disk_space(path: str | Path) -> tuple[int | None, int | None]:
    """(free bytes available to unprivileged users, total bytes) of the filesystem holding ``path``."""
    try:
        st = os.statvfs(path)
    except (OSError, AttributeError):
        return None, None
    return st.f_bavail * st.f_frsize, st.f_blocks * st.f_frsize


def uptime_s(root: Path = _ROOT) -> float | None:
    """Seconds since boot: the first field of ``/proc/uptime``."""
    raw = _read(root / "proc/uptime")
    try:
        return float(raw.split()[0]) if raw else None
    except (ValueError, IndexError):
        return None


def load_1m(root: Path = _ROOT) -> float | None:
    raw = _read(root / "proc/loadavg")
    try:
        return float(raw.split()[0]) if raw else None
    except (ValueError, IndexError):
        return None


def board_info(state_dir: str | Path, root: Path = _ROOT) -> BoardInfo:
    """Collect every figure the OS exposes; missing ones are ``None``."""
    free, total = disk_space(state_dir)
    return BoardInfo(cpu_temperature_c(root), free, total, uptime_s(root), load_1m(root))


# ------------------------------------------------------------------ hardware fingerprint


def machine_id(root: Path = _ROOT) -> str | None:
    """systemd's machine id (``/etc/machine-id``), regenerated on a freshly flashed card by cloud-init."""
    value = _read(root / "etc/machine-id")
    return value or None


def bluetooth_adapters(root: Path = _ROOT) -> dict[str, str | None]:
    """
    Adapters in ``/sys/class/bluetooth`` → their address where sysfs shows one.

    Recent kernels expose only the adapter names there (the address moved to debugfs) [from memory],
    so the address is often ``None``; the adapter count still distinguishes hardware changes.
    """
    base = root / "sys/class/bluetooth"
    try:
        names = sorted(p.name for p in base.iterdir() if p.name.startswith("hci") and ":" not in p.name)
    except OSError:
        return {}
    out: dict[str, str | None] = {}
    for name in names:
        addr = _read(base / name / "address")
        out[name] = addr.upper() if addr else None
    return out


def device_model(root: Path = _ROOT) -> str | None:
    """Board model from the device tree (ARM boards); ``None`` on PCs and in containers."""
    raw = _read(root / "proc/device-tree/model")
    return raw.rstrip("\0") if raw else None


def fingerprint(root: Path = _ROOT) -> dict[str, Any]:
    """The hardware fingerprint sent at enrollment: machine id, hostname, adapters, model."""
    return {
        "machine_id": machine_id(root),
        "hostname": socket.gethostname(),
        "adapters": bluetooth_adapters(root),
        "model": device_model(root),
    }
