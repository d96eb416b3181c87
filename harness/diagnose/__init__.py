"""Fault diagnosis for repair benches: rank single-fault hypotheses against a failed board.

Layer: beside report; imports model, store (through :mod:`harness.diagnose.fromstore`) and
errors.  The ranking core (:mod:`~harness.diagnose.rank`, :mod:`~harness.diagnose.predict`,
:mod:`~harness.diagnose.hypotheses`, :mod:`~harness.diagnose.names`) does no I/O.
"""

from harness.diagnose.fromstore import Diagnosis, diagnose_run
from harness.diagnose.hypotheses import PRIOR_WEIGHT, Hypothesis, channel_hypotheses
from harness.diagnose.rank import Candidate, Evidence, rank_faults, tolerance_spread

__all__ = [
    "PRIOR_WEIGHT",
    "Candidate",
    "Diagnosis",
    "Evidence",
    "Hypothesis",
    "channel_hypotheses",
    "diagnose_run",
    "rank_faults",
    "tolerance_spread",
]
