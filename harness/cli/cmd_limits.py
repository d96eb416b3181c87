"""``stageproof limits BOARD.toml``: the design limits of a board, from its model and tolerances.

Prints one table per channel (nominal, low, high of gain, clipping threshold, THD at the
nominal level, supply current, low corner; which stage clips first and on which half-cycle of
the output; polarity) or, with ``--json``, the full limits with their provenance.
"""

from __future__ import annotations

import argparse
import math
import sys

from harness import jsontext
from harness.io.board import load_board
from harness.model import compute_limits, design_channel
from harness.model.limits import BoardLimits, Limit
from harness.run.runner import check_limits_memory

#: 0 dBu is the voltage that dissipates 1 mW in 600 ohm: sqrt(0.6) = 0.7746 V rms.
DBU_REF_VRMS = math.sqrt(0.6)


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "limits",
        help="compute a board's design limits (Monte Carlo over tolerances)",
        description="Compute gain, clipping-threshold and THD limits of every channel of a board "
        "from its stage model and component tolerances.",
    )
    p.add_argument("board", metavar="BOARD.toml", help="board description (see limits/)")
    p.add_argument(
        "--samples",
        type=_count(100),
        default=None,
        help="Monte Carlo boards (default: the board's [limits] samples)",
    )
    p.add_argument(
        "--seed",
        type=_count(0),
        default=None,
        help="random seed (default: the board's [limits] seed)",
    )
    p.add_argument("--json", action="store_true", help="print the limits as JSON")
    p.set_defaults(func=run)


def _count(minimum: int):
    """argparse type: a whole number of at least ``minimum`` (usage error, status 2, if not)."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"must be at least {minimum}")
        return value

    return parse


def _dbu(vrms: float | None) -> str:
    if vrms is None or not vrms > 0:
        return "-"
    return f"{20.0 * math.log10(vrms / DBU_REF_VRMS):+.2f}"


def _f(x: float | None, fmt: str) -> str:
    return "-" if x is None or not math.isfinite(x) else format(x, fmt)


#: The share of Monte Carlo boards below which the majority clipping side is no better
#: than a coin toss: between 40/60 and 60/40 the side depends on where each board's parts
#: fall within tolerance, and a measured side says little about a fault.
COIN_TOSS_SHARE = 0.6

#: Headers of the two worst-case columns: what was evaluated, not a claimed bracket.
CORNER_COLUMNS = ("corner pushed low", "corner pushed high")
CORNER_NOTE = (
    "low/high: Monte Carlo limits (central interval of the boards, widened by the model's "
    "own uncertainty).  corner pushed low/high: "
    "the quantity with every part at a tolerance end, each the way that alone lowers/raises "
    "it; where the quantity is not monotonic in a part (the swing-limited threshold is the "
    "lesser of two swings) boards can fall outside them: not a worst-case bracket."
)


def side_text(fractions: dict[str, float], nominal: str) -> str:
    """Which half-cycle of the output clips first, as the Monte Carlo boards say: the
    majority side with its share, or "a coin toss" where neither side has a clear
    majority (the nominal design's side then named as such)."""
    pos = float(fractions.get("positive", 0.0))
    neg = float(fractions.get("negative", 0.0))
    major, share, other = ("positive", pos, neg) if pos >= neg else ("negative", neg, pos)
    if share < COIN_TOSS_SHARE:
        return (
            f"either half-cycle of the output, a coin toss (positive {pos:.1%} / negative "
            f"{neg:.1%} of boards; the nominal design: {nominal})"
        )
    minority = "negative" if major == "positive" else "positive"
    return f"{major} half-cycle of the output on {share:.1%} of boards ({minority} on {other:.1%})"


def _row(table, ch, key: str, fmt: str, unit: str, scale: float = 1.0) -> None:
    """One quantity (``key``: its field of the channel limits): nominal, Monte Carlo
    low/high and the worst-case corner values."""
    lim: Limit = getattr(ch, key)

    def s(x: float | None) -> str:
        return _f(None if x is None else x * scale, fmt)

    wc = ch.worst_case.get(key)
    lo, hi = (s(wc.low), s(wc.high)) if wc is not None else ("-", "-")
    table.add_row(lim.name, s(lim.nominal), s(lim.low), s(lim.high), lo, hi, unit)


def run(args: argparse.Namespace) -> int:
    board = load_board(args.board)
    if args.samples is not None:
        check_limits_memory(board, args.samples, "--samples")
    else:
        check_limits_memory(board, board.policy.samples, "board file limits.samples")
    limits = compute_limits(board, samples=args.samples, seed=args.seed)
    if args.json:
        doc = limits.to_dict()
        doc["digest"] = limits.digest
        doc["board"]["file"] = board.source
        sys.stdout.write(jsontext.dumps(doc, indent=2, sort_keys=True))
        sys.stdout.write("\n")
        return 0
    _print_tables(board, limits)
    return 0


def _print_tables(board, limits: BoardLimits) -> None:
    from rich.table import Table
    from rich.text import Text

    from harness.cli.term import make_console

    console = make_console()
    prov = limits.provenance
    console.print(
        Text.assemble(
            (limits.board, "bold"),
            f"  {limits.part_number} rev {limits.revision}  ({board.source})",
        )
    )
    console.print(
        f"Monte Carlo: {prov.samples} boards, coverage {prov.coverage:g}, seed "
        f"{prov.seed}; clipping criterion {prov.criterion}; "
        f"nominal input {board.conditions.nominal_input_vrms:g} V rms at "
        f"{board.conditions.frequency_hz:g} Hz"
    )
    mu = prov.model_uncertainty
    if mu:
        console.print(
            f"model uncertainty added to the bands: gain {100 * mu['gain_rel']:g} %, clipping "
            f"threshold {mu['clip_db']:g} dB, THD {100 * mu['thd_rel']:g} %, bias "
            f"{1e3 * mu['bias_v']:g} mV (measured against ngspice on random boards)"
        )
    for name, ch in limits.channels.items():
        design = design_channel(board, name)
        table = Table(
            title=Text(
                f"channel {name}  ({'inverting' if ch.inverting else 'non-inverting'}"
                f", phase {ch.phase_deg:g}°)"
            ),
            title_justify="left",
        )
        for col in ("quantity", "nominal", "low", "high", *CORNER_COLUMNS, "unit"):
            table.add_column(col, justify="left" if col in ("quantity", "unit") else "right")
        table.caption = CORNER_NOTE
        table.caption_justify = "left"

        def row(key: str, fmt: str, unit: str, scale: float = 1.0, _t=table, _c=ch) -> None:
            _row(_t, _c, key, fmt, unit, scale)

        row("gain_db", ".2f", "dB")
        row("clip_input_vrms", ".4f", "V rms")
        c = ch.clip_input_vrms
        table.add_row("  (as dBu)", _dbu(c.nominal), _dbu(c.low), _dbu(c.high), "", "", "dBu")
        row("swing_clip_input_vrms", ".4f", "V rms")
        row("thd_percent", ".4f", "%")
        row("supply_current_a", ".3f", "mA", 1e3)
        row("low_corner_hz", ".2f", "Hz")
        console.print(table)
        console.print(
            Text.assemble(
                "  clips first: stage ",
                (ch.clip_stage, "bold"),
                f", {side_text(ch.clip_side_fraction, ch.clip_side)}; output at nominal "
                f"{ch.output_vrms_nominal:.4g} V rms; wait {ch.settle_time_s:.3g} s after a "
                f"level change; workable boards {ch.workable_fraction:.2%}",
            )
        )
        if ch.time_constants:
            shape = [
                f"{k} {v['tau_s'] * 1e3:.3g} ms"
                for k, v in ch.time_constants.items()
                if v["kind"] == "operating_point"
            ]
            dc = [
                f"{k} {v['tau_s']:.3g} s"
                for k, v in ch.time_constants.items()
                if v["kind"] == "dc_level"
            ]
            console.print(
                "  time constants that move the operating point (waited for): "
                + (", ".join(shape) or "none")
                + "; that only move the output's DC level (removed by AC coupling or the "
                "fit's offset term): " + (", ".join(dc) or "none")
            )
        for s in design.stages:
            if s.vc_v is not None:
                console.print(
                    f"  {s.name}: I_C {s.ic_a * 1e3:.3f} mA, V_B {s.vb_v:.3f} V, "
                    f"V_E {s.ve_v:.3f} V, V_C {s.vc_v:.3f} V, gain {s.gain:.3f}, "
                    f"swing +{s.swing_pos_v:.2f}/-{s.swing_neg_v:.2f} V"
                )
            else:
                console.print(
                    f"  {s.name}: gain {s.gain:.3f}, swing +{s.swing_pos_v:.2f}/"
                    f"-{s.swing_neg_v:.2f} V"
                )
        if ch.worst_case:
            missed = [k for k, w in ch.worst_case.items() if not w.covered]
            console.print(
                "  corners pushed low/high: "
                + (
                    "inside the Monte Carlo limits"
                    if not missed
                    else "outside the Monte Carlo limits for " + ", ".join(missed)
                )
            )
    console.print(
        f"board supply current {limits.supply_current_a.nominal * 1e3:.3f} mA "
        f"({_f(limits.supply_current_a.low and limits.supply_current_a.low * 1e3, '.3f')}"
        f" .. {_f(limits.supply_current_a.high and limits.supply_current_a.high * 1e3, '.3f')}"
        f" mA)"
    )
    console.print(
        f"limits digest {limits.digest}  (board file sha256 {prov.board_digest[:16]}…, "
        f"stageproof {prov.software_version})"
    )
