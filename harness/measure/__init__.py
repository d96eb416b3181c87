"""Waveform analysis: pure numpy/scipy, array in, result object out, no I/O.

Sine fits (IEEE Std 1241 / 1057), coherent sampling plans, harmonic analysis (THD, THD+N,
SINAD), two-probe gain and phase, clipping evidence, bracketed level-search thresholds and the
measurement floor of the bench.  Imports nothing of the project except harness.errors.
"""

from harness.measure.bracket import (
    FLOOR_TO_READING_U,
    ClipCriterion,
    SearchStep,
    StepPoint,
    SweepCurves,
    Threshold,
    clip_threshold,
    next_search_level,
    sweep_curves,
)
from harness.measure.clipping import ClipEvidence, clip_evidence
from harness.measure.coherent import CoherentPlan, plan_coherent
from harness.measure.floor import MeasurementFloor, measurement_floor, quantisation_snr_db
from harness.measure.harmonics import Harmonics, harmonic_analysis
from harness.measure.record import RecordAnalysis, analyze_record, analyze_uniform
from harness.measure.sinefit import (
    SineFit,
    fit_sine3,
    fit_sine3_uniform,
    fit_sine4,
    fit_sine4_uniform,
)
from harness.measure.transfer import Transfer, transfer, transfer_uniform
from harness.measure.units import dbu_to_vrms, vrms_to_dbu
from harness.measure.windows import WindowProperties, blackman_harris4, window_properties

__all__ = [
    "FLOOR_TO_READING_U",
    "ClipCriterion",
    "ClipEvidence",
    "CoherentPlan",
    "Harmonics",
    "MeasurementFloor",
    "RecordAnalysis",
    "SearchStep",
    "SineFit",
    "StepPoint",
    "SweepCurves",
    "Threshold",
    "Transfer",
    "WindowProperties",
    "analyze_record",
    "analyze_uniform",
    "blackman_harris4",
    "clip_evidence",
    "clip_threshold",
    "dbu_to_vrms",
    "fit_sine3",
    "fit_sine3_uniform",
    "fit_sine4",
    "fit_sine4_uniform",
    "harmonic_analysis",
    "measurement_floor",
    "next_search_level",
    "plan_coherent",
    "quantisation_snr_db",
    "sweep_curves",
    "transfer",
    "transfer_uniform",
    "vrms_to_dbu",
    "window_properties",
]
