"""
What a board pays for the agent: the agent-only environment against the full one (``[collector]``), both
made in this run from a freshly built wheel, and the agent's peak RSS on a dry-run replay in each.

Sizes are bytes of the virtual environments' files (pip's own ~15 MB included in both). Peak RSS is the
child's ``ru_maxrss`` from ``wait4``, the median of ``REPEATS`` runs per environment, alternated so
both see the same machine.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import tempfile
from pathlib import Path

from tests.packaging.installed import build_wheel, make_env, package_data, size_on_disk

REPEATS = 5


def peak_rss_kib(argv: list[str]) -> int:
    """Peak resident set of one child process, KiB (Linux ``ru_maxrss``)."""
    proc = subprocess.Popen(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd="/")
    _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise RuntimeError(f"{argv} exited {proc.returncode}")
    return usage.ru_maxrss


def main(quick: bool = False) -> None:
    repeats = 1 if quick else REPEATS
    with tempfile.TemporaryDirectory(prefix="listenpost-footprint-") as tmp:
        root = Path(tmp)
        wheel = build_wheel(root / "dist")
        envs = {
            "agent only": make_env(root / "agent", wheel),
            "with [collector]": make_env(root / "full", wheel, "collector"),
        }
        logs = package_data(envs["agent only"], "listenpost.replay_logs")
        rss: dict[str, list[int]] = {name: [] for name in envs}
        for _ in range(repeats):
            for name, bin_dir in envs.items():
                rss[name].append(
                    peak_rss_kib(
                        [
                            str(bin_dir / "listenpost"),
                            "agent",
                            "replay",
                            "--dry-run",
                            "--fast",
                            "--tags",
                            str(logs / "tags.txt"),
                            str(logs / "g0-a.jsonl.gz"),
                        ]
                    )
                )
        print(f"{'environment':<18} {'on disk MB':>10} {'peak RSS MB (median of ' + str(repeats) + ')':>28}")
        sizes = {}
        for name, bin_dir in envs.items():
            sizes[name] = size_on_disk(bin_dir.parent)
            print(f"{name:<18} {sizes[name] / 1e6:>10.1f} {statistics.median(rss[name]) / 1024:>28.1f}")
        a, f = sizes["agent only"], sizes["with [collector]"]
        print(f"agent-only / full on disk: {a / f:.2f}; the collector extra adds {(f - a) / 1e6:.1f} MB")
        print(
            f"agent dry-run RSS, agent-only / full: "
            f"{statistics.median(rss['agent only']) / statistics.median(rss['with [collector]']):.2f}"
        )


if __name__ == "__main__":
    main()
