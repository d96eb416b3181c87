"""The limit model against ngspice on boards generated at random, at and past clipping.

Common-emitter boards and common-emitter boards driving an emitter follower (DC-coupled or
through a capacitor) are drawn with a fixed seed within workable ranges: supply, collector
current, emitter voltage, divider stiffness, collector position, bypassed share of the emitter
resistance, load, beta, I_S, reverse beta and Early voltage.  Every board is written as a
board file, read back by the loader, and both the model and ngspice (Debian package ngspice,
Gummel-Poon BJT with the board's IS, BF, BR and VAF; netlist from the same board file by
harness.model.spice) work from it.  ngspice runs a settled ``tran`` (the coupling capacitors
are sized so that 2 pi f tau = 40 and the run lasts 80 periods, about 12 tau) with
``fourier`` (harmonics 1-10) of the output, the input node and the DC nodes.

Checked for each board (the model's promise, quoted in the limits' provenance as its own
uncertainty: harness.model.limits.MODEL_UNCERTAINTY):

* bias at rest (ngspice ``op``) and under the heaviest drive (DC terms of ``fourier``): 30 mV;
* small-signal gain (ngspice ``ac``): 1 %;
* THD at 0.5, 1, 1.4 and 2 times the 1 % THD input level: 15 % of ngspice's value;
* the 1 % THD crossing and the 1 dB compression point: 0.1 dB, found from ngspice's THD and
  fundamental at the model's level and 0.1 dB either side.

The worst case of every quantity over the set is printed (also when the test passes).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pytest

from harness.io.board import load_board
from harness.model import design_channel, large_signal_harmonics, operating_point
from harness.model.board import Board
from harness.model.design import large_signal_bias
from harness.model.limits import MODEL_UNCERTAINTY
from harness.model.spice import SpiceCopy, batch_netlist, parse_fourier_all, parse_values
from tests.support.boards import write_board

pytestmark = pytest.mark.ngspice

SEED = 20261203
BOARDS = 30
BOARDS_PER_RUN = 2
F_HZ = 1000.0
TWO_PI_F_TAU = 40.0
PERIODS = 80
POINTS_PER_PERIOD = 200
THD_LEVELS = (0.5, 1.0, 1.4, 2.0)
DB_STEP = 0.1

HEAD = """
[board]
name = "random board {k}"
part_number = "R-{k}"

[supply]
positive_v = "{vcc:.6g} 0%"

[conditions]
frequency_hz = {f:g}
nominal_input_vrms = {nominal:.6g}
safe_input_vrms = 10
source_ohm = {source:.6g}
load_ohm = "{load:.6g} 0%"
clip_criterion = "{criterion}"

[tolerances]
resistor = "1%"
capacitor = "10%"

[transistor.q]
polarity = "npn"
beta = {beta:.6g}
is_a = {is_a:.6g}
beta_r = {beta_r:.6g}
vce_sat_v = 0.1
{early}
[[channel]]
name = "X"
"""


def _cap(r_seen: float) -> float:
    return TWO_PI_F_TAU / (2.0 * math.pi * F_HZ * r_seen)


def _random_board_text(rng: np.random.Generator, k: int) -> tuple[str, dict[str, object]]:
    """One workable board (values from a small design recipe, drawn at random)."""
    vcc = rng.uniform(9.0, 24.0)
    beta = rng.uniform(80.0, 400.0)
    is_a = 10 ** rng.uniform(-14.7, -13.3)
    beta_r = rng.uniform(1.0, 8.0)
    vaf = rng.uniform(40.0, 200.0) if rng.random() < 0.5 else None
    ic = 10 ** rng.uniform(math.log10(0.3e-3), math.log10(3e-3))
    ve = rng.uniform(0.08, 0.2) * vcc
    r_e_total = ve / ic
    share = 1.0 if rng.random() < 0.4 else rng.uniform(0.05, 0.5)  # unbypassed share
    vb = ve + 0.65
    i_div = rng.uniform(8.0, 20.0) * ic / beta
    r2 = vb / i_div
    r1 = (vcc - vb) / (i_div + ic / beta)
    vc = ve + rng.uniform(0.35, 0.7) * (vcc - ve)
    rc = (vcc - vc) / ic
    r_th = r1 * r2 / (r1 + r2)
    kind = ("ce", "ce_dc_follower", "ce_cap_follower")[k % 3]
    re, re_byp = share * r_e_total, (1.0 - share) * r_e_total
    z_in = 1.0 / (1.0 / r_th + 1.0 / (beta * (re + 0.026 / ic)))
    stage = [
        '  [[channel.stage]]\n  kind = "common_emitter"\n  name = "gain"\n  transistor = "q"',
        f'  r1 = "{r1:.6g}"\n  r2 = "{r2:.6g}"\n  rc = "{rc:.6g}"\n  re = "{re:.6g}"',
        f'  c_in = "{_cap(min(z_in, r_th) * 0.5 + 0.5 * r_th):.6g}"',
    ]
    if share < 1.0:
        r_look = re + 0.026 / ic + r_th / beta
        r_par = re_byp * r_look / (re_byp + r_look)
        stage.append(f'  re_bypassed = "{re_byp:.6g}"\n  c_e = "{_cap(r_par):.6g}"')
    info: dict[str, object] = {"kind": kind, "vaf": vaf, "share": share, "vcc": vcc}
    if kind == "ce":
        load = rc * rng.uniform(2.0, 30.0)
        stage.append(f'  c_out = "{_cap(rc + load):.6g}"')
        text = "\n".join(stage) + "\n"
    else:
        ie2 = rng.uniform(1.0, 5.0) * 1e-3
        if kind == "ce_dc_follower":
            re2 = (vc - 0.65) / ie2
            follower = (
                '  [[channel.stage]]\n  kind = "emitter_follower"\n  name = "buffer"\n'
                f'  transistor = "q"\n  coupling = "dc"\n  re = "{re2:.6g}"'
            )
        else:
            vb2 = rng.uniform(0.4, 0.6) * vcc
            re2 = (vb2 - 0.65) / ie2
            i_div2 = rng.uniform(8.0, 20.0) * ie2 / beta
            r2b = vb2 / i_div2
            r1b = (vcc - vb2) / (i_div2 + ie2 / beta)
            r_thb = r1b * r2b / (r1b + r2b)
            follower = (
                '  [[channel.stage]]\n  kind = "emitter_follower"\n  name = "buffer"\n'
                f'  transistor = "q"\n  coupling = "ac"\n  re = "{re2:.6g}"\n'
                f'  r1 = "{r1b:.6g}"\n'
                f'  r2 = "{r2b:.6g}"\n  c_in = "{_cap(rc + r_thb):.6g}"'
            )
        load = re2 * rng.uniform(1.0, 10.0)
        follower += f'\n  c_out = "{_cap(re2 * 0.02 + load):.6g}"'
        text = "\n".join(stage) + "\n\n" + follower + "\n"
    early = (
        f"early_v = {{ min = {vaf * 0.8:.6g}, typ = {vaf:.6g}, max = {vaf * 1.2:.6g} }}\n"
        if vaf is not None
        else ""
    )
    head = dict(
        k=k,
        vcc=vcc,
        f=F_HZ,
        nominal=0.001,
        source=rng.choice([1.0, 50.0, 600.0]),
        load=load,
        beta=beta,
        is_a=is_a,
        beta_r=beta_r,
        early=early,
    )
    return HEAD.format(criterion="@CRITERION@", **head) + text, info


@dataclass
class Worst:
    """Largest error of one quantity over the set, and where."""

    name: str
    unit: str
    limit: float
    value: float = 0.0
    where: str = ""

    def see(self, err: float, where: str) -> None:
        if not abs(err) <= abs(self.value):
            self.value, self.where = err, where

    def line(self) -> str:
        return (
            f"  {self.name:<34} worst {self.value:+.4g} {self.unit} (allowed {self.limit:g})"
            f" at {self.where}"
        )


def _crossing_db(levels_db: list[float], score: list[float]) -> float:
    """Where ``score`` (ascending with level) crosses 0, linear in dB between the points
    bracketing it (or from the end segment if the points do not bracket it)."""
    x, y = np.asarray(levels_db), np.asarray(score)
    order = np.argsort(x)
    x, y = x[order], y[order]
    i = int(np.searchsorted(y, 0.0))
    i = min(max(i, 1), len(x) - 1)
    return float(x[i - 1] + (x[i] - x[i - 1]) * (0.0 - y[i - 1]) / (y[i] - y[i - 1]))


def _thd_of(rows: list[tuple[int, float, float]]) -> float:
    mags = {n: m for n, _, m in rows}
    return 100.0 * math.sqrt(sum(mags[n] ** 2 for n in range(2, 11))) / mags[1]


def test_model_agrees_with_ngspice_on_random_boards(tmp_path, spice, capsys) -> None:
    """See the module docstring: random CE and CE-into-follower boards against ngspice."""
    rng = np.random.default_rng(SEED)
    u = MODEL_UNCERTAINTY
    worst = {
        "bias": Worst("bias at rest and under drive", "V", u["bias_v"]),
        "gain": Worst("small-signal gain", "%", 100 * u["gain_rel"]),
        "thd": Worst("THD up to 2x the 1 % threshold", "%", 100 * u["thd_rel"]),
        "crossing": Worst("1 % THD crossing", "dB", u["clip_db"]),
        "compression": Worst("1 dB compression point", "dB", u["clip_db"]),
    }
    plans: list[tuple[str, Board, Board, dict[str, object], list[SpiceCopy]]] = []
    for k in range(BOARDS):
        text, info = _random_board_text(rng, k)
        thd_board = load_board(
            write_board(tmp_path, text.replace("@CRITERION@", "thd"), f"b{k}.toml")
        )
        comp_board = load_board(
            write_board(tmp_path, text.replace("@CRITERION@", "compression"), f"c{k}.toml")
        )
        l1 = design_channel(thd_board, "X").thd_clip_input_vrms * math.sqrt(2.0)
        lc = design_channel(comp_board, "X").thd_clip_input_vrms * math.sqrt(2.0)
        # the model's levels are at the input node; the generator sits behind source_ohm
        mine = [SpiceCopy(f"{k}t{i}", thd_board, "X", l1 * r) for i, r in enumerate(THD_LEVELS)]
        mine += [
            SpiceCopy(f"{k}x{i}", thd_board, "X", l1 * 10 ** (d / 20))
            for i, d in enumerate((-DB_STEP, DB_STEP))
        ]
        mine += [
            SpiceCopy(f"{k}c{i}", thd_board, "X", lc * 10 ** (d / 20))
            for i, d in enumerate((-DB_STEP, 0.0, DB_STEP))
        ]
        plans.append((f"board {k} ({info['kind']})", thd_board, comp_board, info, mine))
    values: dict[str, float] = {}
    fourier: dict[str, tuple[float, list[tuple[int, float, float]]]] = {}
    for i in range(0, len(plans), BOARDS_PER_RUN):  # small batches: ngspice's cost grows
        batch = [c for plan in plans[i : i + BOARDS_PER_RUN] for c in plan[4]]
        net = batch_netlist(
            batch, F_HZ, transient_periods=PERIODS, points_per_period=POINTS_PER_PERIOD
        )
        out = spice(net, timeout_s=600)
        values.update(parse_values(out))
        fourier.update(parse_fourier_all(out))

    for name, board, comp_board, _info, mine in plans:
        d = design_channel(board, "X")
        op = operating_point(board, "X")
        x0 = mine[0].label
        # rest bias
        for j, st in enumerate(board.channel("X").stages):
            for node, q in (("b", "base_v"), ("e", "emitter_v"), ("c", "collector_v")):
                if st.kind == "emitter_follower" and node == "c":
                    continue
                err = op[f"{st.name}.{q}"] - values[f"v(x{x0}.{node}{j})"]
                worst["bias"].see(err, f"{name}, {st.name}.{q} at rest")
        # gain
        g = math.hypot(values[f"g{x0}r"], values[f"g{x0}i"])
        worst["gain"].see(100.0 * (abs(d.gain) / g - 1.0), name)

        def measured(c: SpiceCopy) -> tuple[float, float, float]:
            """(input peak at the input node, THD %, fundamental gain) of one copy."""
            _, rows_out = fourier[f"v(x{c.label}.out)"]
            _, rows_in = fourier[f"v(x{c.label}.in)"]
            vin = {n: m for n, _, m in rows_in}[1]
            return vin, _thd_of(rows_out), {n: m for n, _, m in rows_out}[1] / vin

        # THD along the drive, and the bias under the heaviest drive
        for c in mine[: len(THD_LEVELS)]:
            vin, thd_ref, _ = measured(c)
            h = large_signal_harmonics(board, "X", vin / math.sqrt(2.0))
            thd_model = 100.0 * math.sqrt(float(np.sum(h[2:11] ** 2))) / h[1]
            err = 100.0 * (thd_model / thd_ref - 1.0) if thd_ref > 0.02 else 0.0
            worst["thd"].see(err, f"{name} at {vin / mine[1].amplitude_vpk:.2f}x threshold")
        heavy = mine[len(THD_LEVELS) - 1]
        vin, _, _ = measured(heavy)
        shifted = large_signal_bias(board, "X", vin / math.sqrt(2.0))
        for j, st in enumerate(board.channel("X").stages):
            for node, q in (("b", "base_v"), ("e", "emitter_v"), ("c", "collector_v")):
                if st.kind == "emitter_follower" and node == "c":
                    continue
                ref = {n: m for n, _, m in fourier[f"v(x{heavy.label}.{node}{j})"][1]}[0]
                worst["bias"].see(shifted[f"{st.name}.{q}"] - ref, f"{name}, {st.name}.{q} driven")
        # 1 % THD crossing from ngspice's points at the model's level and 0.1 dB either side
        pts = [measured(mine[4]), measured(mine[1]), measured(mine[5])]
        ref_db = _crossing_db(
            [20 * math.log10(p[0]) for p in pts], [math.log(p[1] / 1.0) for p in pts]
        )
        model_db = 20 * math.log10(d.thd_clip_input_vrms * math.sqrt(2.0))
        worst["crossing"].see(model_db - ref_db, name)
        # 1 dB compression from ngspice's fundamental against its small-signal gain
        pts = [measured(c) for c in mine[6:9]]
        ref_db = _crossing_db(
            [20 * math.log10(p[0]) for p in pts], [20 * math.log10(g / p[2]) - 1.0 for p in pts]
        )
        dc = design_channel(comp_board, "X")
        model_db = 20 * math.log10(dc.thd_clip_input_vrms * math.sqrt(2.0))
        worst["compression"].see(model_db - ref_db, name)

    report = "\n".join(
        [f"model against ngspice, {BOARDS} random boards (seed {SEED}):"]
        + [w.line() for w in worst.values()]
    )
    with capsys.disabled():
        print("\n" + report)
    for w in worst.values():
        assert abs(w.value) <= w.limit, report
