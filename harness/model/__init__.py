"""The model of a board: stage physics, nominal design and limits from tolerances.

Pure numerics (no file, socket or print I/O).  The public API:

* :func:`design_channel` -> :class:`ChannelDesign` (nominal figures of one channel);
* :func:`operating_point` -> ``{"<stage>.<quantity>": volts}``;
* :func:`compute_limits` -> :class:`BoardLimits` (Monte Carlo limits with provenance);
* :func:`validate_board` (raises BoardFileError when the circuit cannot work).
"""

from harness.model.design import (
    ChannelDesign,
    StageDesign,
    design_channel,
    large_signal_harmonics,
    operating_point,
    validate_board,
)
from harness.model.limits import (
    BoardLimits,
    ChannelLimits,
    Limit,
    Provenance,
    WorstCase,
    compute_limits,
)
from harness.model.params import thermal_voltage

__all__ = [
    "BoardLimits",
    "ChannelDesign",
    "ChannelLimits",
    "Limit",
    "Provenance",
    "StageDesign",
    "WorstCase",
    "compute_limits",
    "design_channel",
    "large_signal_harmonics",
    "operating_point",
    "thermal_voltage",
    "validate_board",
]
