"""Production statistics for the summary report: process capability and yield.

Pure functions of numbers and DataFrames (no store, no files), so the tests can hold them
against hand computations.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

#: Cpk below this is flagged.  1.33 (a 4σ distance to the nearest limit, about 32 ppm
#: outside on that side for a normal process) is common practice for an established process.
CPK_THRESHOLD = 1.33

#: Fewest boards (values) for which Cp and Cpk are shown.  With a handful of boards the
#: sample s can be tiny by chance and the index absurd (two or three near-identical boards
#: give Cpk in the millions); 25 or more subgroups/values before judging capability is the
#: usual rule of thumb (common practice, e.g. the control-chart guidance of the
#: NIST/SEMATECH e-Handbook of Statistical Methods, ch. 6).
CPK_MIN_BOARDS = 25


@dataclass(frozen=True)
class Capability:
    """Process capability of one measurement (NIST/SEMATECH e-Handbook §6.1.6).

    ``sigma`` is the sample standard deviation s (n - 1 in the denominator), the estimate
    the handbook substitutes for σ.  ``cp`` needs both limits; ``cpk`` is the one-sided
    index (Cpu or Cpl) when only one limit exists.  None where it cannot be computed
    (fewer than two values, no limit, or no spread at all).  Below :data:`CPK_MIN_BOARDS`
    values the indices are computed but not to be shown: :attr:`enough` is False, nothing
    is flagged, and :meth:`to_dict` and the reports say "too few boards".
    """

    n: int
    mean: float
    sigma: float
    low: float | None
    high: float | None
    cp: float | None
    cpu: float | None
    cpl: float | None
    cpk: float | None

    @property
    def enough(self) -> bool:
        """True when there are enough values for the indices to mean anything."""
        return self.n >= CPK_MIN_BOARDS

    @property
    def too_few_text(self) -> str | None:
        """ "too few boards (n = 3, Cpk needs 25)" below :data:`CPK_MIN_BOARDS`, else None."""
        if self.enough:
            return None
        return f"too few boards (n = {self.n}, Cpk needs {CPK_MIN_BOARDS})"

    @property
    def flagged(self) -> bool:
        """True when Cpk is known from enough boards and under :data:`CPK_THRESHOLD`."""
        return self.enough and self.cpk is not None and self.cpk < CPK_THRESHOLD

    def to_dict(self) -> dict[str, object]:
        """The figures as shown: cp/cpk/cpu/cpl null (with ``note``) below the minimum n."""
        shown = self.enough
        return {
            "n": self.n,
            "mean": self.mean if self.n else None,
            "s": self.sigma if self.n >= 2 else None,
            "low": self.low,
            "high": self.high,
            "cp": self.cp if shown else None,
            "cpk": self.cpk if shown else None,
            "cpu": self.cpu if shown else None,
            "cpl": self.cpl if shown else None,
            "min_boards": CPK_MIN_BOARDS,
            "flagged": self.flagged,
            "note": self.too_few_text,
        }


def capability(
    values: Sequence[float] | np.ndarray, low: float | None, high: float | None
) -> Capability:
    """Cp = (USL − LSL)/(6s); Cpu = (USL − x̄)/(3s); Cpl = (x̄ − LSL)/(3s); Cpk = min(Cpu, Cpl).

    Values that are None or NaN (not measurable) are left out and not counted in ``n``.
    """
    v = np.asarray([x for x in values if x is not None], dtype=float)
    v = v[np.isfinite(v)]
    n = int(v.size)
    mean = float(v.mean()) if n else math.nan
    sigma = float(v.std(ddof=1)) if n >= 2 else math.nan
    low = None if low is None or not math.isfinite(low) else float(low)
    high = None if high is None or not math.isfinite(high) else float(high)
    ok = n >= 2 and sigma > 0
    cp = (high - low) / (6 * sigma) if ok and low is not None and high is not None else None
    cpu = (high - mean) / (3 * sigma) if ok and high is not None else None
    cpl = (mean - low) / (3 * sigma) if ok and low is not None else None
    sides = [c for c in (cpu, cpl) if c is not None]
    cpk = min(sides) if sides else None
    return Capability(n, mean, sigma, low, high, cp, cpu, cpl, cpk)


@dataclass(frozen=True)
class Yield:
    """First-pass and final yield over the serials of a population.

    ``first_pass``: share of serials whose first test passed; ``final``: share whose last
    test passed.  Only finished tests count (status 'complete' with a verdict): an aborted
    run judged nothing about the board.
    """

    serials: int
    first_pass_count: int
    final_count: int
    retested: int  # serials tested more than once

    @property
    def first_pass(self) -> float:
        return self.first_pass_count / self.serials if self.serials else math.nan

    @property
    def final(self) -> float:
        return self.final_count / self.serials if self.serials else math.nan


def finished_runs(runs: pd.DataFrame) -> pd.DataFrame:
    """Complete runs with a verdict, oldest first (ties broken by run id)."""
    done = runs[(runs["status"] == "complete") & runs["verdict"].isin(["PASS", "FAIL"])]
    return done.sort_values(["started_at", "run_id"], kind="stable")


def first_and_last(runs: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """The first and the last finished run of each (part number, serial)."""
    done = finished_runs(runs)
    keys = ["part_number", "serial"]
    return done.drop_duplicates(keys, keep="first"), done.drop_duplicates(keys, keep="last")


def yields(runs: pd.DataFrame) -> Yield:
    """Yield over every (part number, serial) with at least one finished run in ``runs``.

    ``runs`` needs columns run_id, serial, part_number, status, verdict, started_at.
    """
    first, last = first_and_last(runs)
    counts = finished_runs(runs).groupby(["part_number", "serial"]).size()
    return Yield(
        serials=len(first),
        first_pass_count=int((first["verdict"] == "PASS").sum()),
        final_count=int((last["verdict"] == "PASS").sum()),
        retested=int((counts > 1).sum()),
    )
