"""Measurement names: the run layer's stored names and the diagnosis's own keys.

Why a module of its own: the diagnosis reads stored rows by their registry entry
(:mod:`harness.quantities`: each quantity's ``evidence`` is its key here), so the stored
names and the diagnosis keys never meet anywhere but in that registry.

Diagnosis keys (the keys of the ``measurements`` mapping :func:`rank_faults` takes):

==============================  =========================================================
key                             meaning (value, U = expanded uncertainty, k = 2)
==============================  =========================================================
``<ch>.gain_db``                gain at the board's test frequency and nominal level, dB
``<ch>.thd_percent``            THD at the nominal level, %
``<ch>.thd_floor_percent``      the bench's THD floor for that record (no U)
``<ch>.clip_input_vrms``        input level where the clip criterion is met, V rms
``<ch>.clip_above_vrms``        criterion not met up to this level (threshold is above)
``<ch>.clip_below_vrms``        criterion already met at this level (threshold is below)
``<ch>.clip_side``              ``"positive"`` / ``"negative"`` output half-cycle (no U)
``<ch>.gain_db@<f>``            gain at extra frequency ``<f>`` Hz, dB
``<ch>.<stage>.<quantity>``     DC test point (collector_v, emitter_v, base_v, output_v), V
``supply_current_a``            quiescent current of the whole board, A
==============================  =========================================================

A dead channel's gain (the run's ``condition`` row says ``dead`` or ``stuck``) is
``-inf``: the ranking floors it at its dead level.  :func:`channel_modes` reads the modes
themselves (an oscillation or hum is not a component fault the stage model can predict).
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Mapping
from typing import Any, Protocol

from harness.quantities import (
    BOARD_EVIDENCE,
    CLIP_ABOVE_EVIDENCE,
    CLIP_BELOW_EVIDENCE,
    CLIP_INPUT,
    CLIP_SIDE,
    CONDITION,
    GAIN,
    THD,
    THD_FLOOR_EVIDENCE,
    gain_at,
    lookup,
)

#: Channel modes (the run's ``condition`` row) in which the output carries no signal.
DEAD_MODES = frozenset({"dead", "stuck"})


class RowLike(Protocol):
    """What :func:`from_rows` needs of a stored measurement row."""

    channel: str
    name: str
    value: float | None
    uncertainty: float | None
    detail_json: str | None


def key(channel: str, quantity: str) -> str:
    """The diagnosis key of ``quantity`` on ``channel`` (board-wide ones have no prefix)."""
    return quantity if not channel or quantity in BOARD_EVIDENCE else f"{channel}.{quantity}"


def split_key(name: str) -> tuple[str, str]:
    """``"A.gain.collector_v"`` -> ``("A", "gain.collector_v")``; board-wide -> ``("", name)``."""
    if name in BOARD_EVIDENCE:
        return "", name
    channel, _, quantity = name.partition(".")
    return channel, quantity


def freq_quantity(frequency_hz: float) -> str:
    """The diagnosis quantity of the gain at an extra frequency."""
    evidence = gain_at(frequency_hz).evidence
    assert evidence is not None
    return evidence


def _detail(row: RowLike) -> dict[str, Any]:
    if not row.detail_json:
        return {}
    try:
        doc = json.loads(row.detail_json)
    except (TypeError, ValueError):
        return {}
    return doc if isinstance(doc, dict) else {}


def _finite(x: Any) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def from_rows(rows: Iterable[RowLike]) -> dict[str, tuple[Any, float | None]]:
    """The diagnosis measurements of one run from its stored rows.

    Later rows win (a retaken measurement replaces the earlier one); rows the diagnosis does
    not use (phase, precheck notes) are skipped.  A clipping threshold stored without a value
    becomes a bound when the row's detail says which way the search ended.
    """
    out: dict[str, tuple[Any, float | None]] = {}
    for r in rows:
        q = lookup(r.name)
        if q is None or q.evidence is None:
            continue
        d = _detail(r)
        u = _finite(r.uncertainty)
        value = _finite(r.value)
        if q is CLIP_SIDE:
            side = d.get("side")
            if side in ("positive", "negative"):
                out[key(r.channel, q.evidence)] = (side, None)
            continue
        if q is CLIP_INPUT and value is None:
            above = _finite(d.get("highest_measured_vrms"))
            below = _finite(d.get("lowest_measured_vrms"))
            if above is not None:
                out[key(r.channel, CLIP_ABOVE_EVIDENCE)] = (above, u)
            elif below is not None:
                out[key(r.channel, CLIP_BELOW_EVIDENCE)] = (below, u)
            continue
        if q is GAIN and value is None and d.get("mode") in DEAD_MODES:
            # a dead channel (or one stuck at a rail): no output above the floor
            out[key(r.channel, q.evidence)] = (-math.inf, None)
            continue
        if value is None:
            continue
        out[key(r.channel, q.evidence)] = (value, u)
        if q is THD:
            floor = _finite(d.get("floor_percent"))
            if floor is not None:
                out[key(r.channel, THD_FLOOR_EVIDENCE)] = (floor, None)
    return out


def channel_modes(rows: Iterable[RowLike]) -> dict[str, dict[str, Any]]:
    """Channel -> its stored condition (``mode``, ``text``, ``evidence``) where not working."""
    out: dict[str, dict[str, Any]] = {}
    for r in rows:
        if r.name == CONDITION.name:
            d = _detail(r)
            if d.get("mode") not in (None, "working"):
                out[r.channel] = d
    return out


def channels_measured(measurements: Mapping[str, Any]) -> set[str]:
    return {c for c, _ in map(split_key, measurements) if c}
