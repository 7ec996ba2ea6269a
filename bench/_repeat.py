"""
Side-by-side measurement with repeats: the sides of a comparison run interleaved (A B A B ...), each
ratio is taken within one round (so slow drift of the machine hits both sides of it alike), and the
ratios are reported as median with their spread (min-max and the interquartile range).

Every reported ratio is also kept in `RESULTS`, so ``python -m bench`` can print one table at the end.
"""

from __future__ import annotations

import statistics
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from typing import Any

QUICK = False
"""Set by ``python -m bench --quick``: every bench runs its smallest setting (a smoke run, not a figure)."""


@dataclass(frozen=True)
class Ratio:
    bench: str
    name: str
    values: tuple[float, ...]
    target: str

    @property
    def median(self) -> float:
        return statistics.median(self.values)

    @property
    def iqr(self) -> tuple[float, float]:
        if len(self.values) < 2:
            return self.values[0], self.values[0]
        q = statistics.quantiles(self.values, n=4, method="inclusive")
        return q[0], q[2]

    def line(self) -> str:
        q1, q3 = self.iqr
        target = f"; target {self.target}" if self.target else ""
        return (
            f"ratio {self.name} = {self.median:.2f} median of {len(self.values)} "
            f"(min-max {min(self.values):.2f}-{max(self.values):.2f}, IQR {q1:.2f}-{q3:.2f}{target})"
        )

    def as_dict(self) -> dict[str, Any]:
        return {**asdict(self), "median": self.median, "iqr": self.iqr}


RESULTS: list[Ratio] = []


def repeats(full: int, quick: int = 2) -> int:
    """How many rounds to run in this setting."""
    return quick if QUICK else full


def interleave(sides: Sequence[tuple[str, Callable[[], Any]]], rounds: int) -> dict[str, list[Any]]:
    """Run every side once per round, in the same order each round; each side's results by name."""
    out: dict[str, list[Any]] = {name: [] for name, _ in sides}
    for _ in range(rounds):
        for name, run in sides:
            out[name].append(run())
    return out


def report(bench: str, name: str, values: Sequence[float], target: str = "") -> Ratio:
    """Print one ratio line (median and spread over the rounds) and keep it for the summary."""
    r = Ratio(bench, name, tuple(float(v) for v in values), target)
    RESULTS.append(r)
    print("    " + r.line(), flush=True)
    return r


def spread(values: Sequence[float], fmt: str = ",.0f", unit: str = "") -> str:
    """``median (min-max)`` of one side's figures, for the lines beside a ratio."""
    return (
        f"{statistics.median(values):{fmt}}{unit} (min-max {min(values):{fmt}}-{max(values):{fmt}}, "
        f"{len(values)} runs)"
    )
