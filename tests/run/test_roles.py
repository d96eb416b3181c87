"""The run layer's typed roles and its composition: the real drivers fill the roles, the
shared steps drive a simulated bench over loopback sockets, and the production sequence and
the characterisation are two orders of the same steps.

External references: structural subtyping of protocols (PEP 544, "Protocol members": a
class fills a protocol when it has every member with a compatible signature), and a
digitiser's quantisation (an N-bit converter over a full-scale range R has steps of R / 2^N,
common practice).
"""

from __future__ import annotations

import inspect
import math

import numpy as np
import pytest

from harness.instruments import drivers
from harness.instruments.bench import Instruments
from harness.instruments.session import Session
from harness.io.fixture import load_fixture
from harness.io.station import load_station
from harness.run import characterize as char_mod
from harness.run import roles, steps
from harness.run import sequence as seq_mod
from harness.run.bench_ops import plan_record
from harness.run.characterize import (
    CharacterisationSteps,
    CharacterizeOptions,
    characterisation_order,
)
from harness.run.progress import RecordingProgress
from harness.run.safety import connect_safe
from harness.run.sequence import ProductionSteps, RunOptions, production_order
from harness.store import open_store
from tests.support.bench import FIXTURE_FILE, ends_off, sim_bench

ROLE_OF = [
    (roles.GeneratorRole, drivers.Generator),
    (roles.ScopeRole, drivers.Scope),
    (roles.SwitchRole, drivers.Switch),
    (roles.DmmRole, drivers.Dmm),
    (roles.SupplyRole, drivers.Supply),
    (roles.Source, drivers.Generator),
    (roles.Source, drivers.Supply),
    (roles.Routes, drivers.Switch),
    (roles.Recoveries, Session),
    (roles.OpenStation, Instruments),
]


def _members(proto: type) -> dict[str, object]:
    """A protocol's own members (methods and properties), as declared."""
    out: dict[str, object] = {}
    for klass in proto.__mro__:
        if klass is object or not getattr(klass, "_is_protocol", False):
            continue
        for name, value in vars(klass).items():
            if not name.startswith("_") and name not in out:
                out[name] = value
    return out


@pytest.mark.parametrize(("proto", "cls"), ROLE_OF, ids=lambda x: x.__name__)
def test_each_real_driver_fills_its_role(proto, cls):
    """PEP 544: every member of the role exists on the driver; a method takes every
    parameter the role declares, of the same kind, with a default where the role has one."""
    members = _members(proto)
    assert members, f"{proto.__name__} declares nothing"
    fields = getattr(cls, "__dataclass_fields__", {})
    init = vars(cls).get("__init__")
    init_src = inspect.getsource(init) if init is not None and not fields else ""
    for name, member in members.items():
        have = inspect.getattr_static(cls, name, None)
        if have is None or name in fields:
            # a dataclass field, or an attribute its own __init__ sets
            assert name in fields or f"self.{name} =" in init_src, (
                f"{cls.__name__} has no {name} ({proto.__name__})"
            )
            continue
        if isinstance(member, property):
            continue
        want = inspect.signature(member)
        got = inspect.signature(have)
        for pname, p in want.parameters.items():
            if pname == "self":
                continue
            assert pname in got.parameters, f"{cls.__name__}.{name} lacks {pname}"
            q = got.parameters[pname]
            assert q.kind == p.kind, f"{cls.__name__}.{name}({pname}) is {q.kind}, not {p.kind}"
            if p.default is not inspect.Parameter.empty:
                assert q.default is not inspect.Parameter.empty, (
                    f"{cls.__name__}.{name}({pname}) needs a default"
                )


def test_a_driver_without_a_member_is_caught():
    """The check above can fail: a class missing a role's method does not pass it."""

    class NoReadback:
        def configure_sine(self, frequency_hz: float, output: int = 1) -> float:
            return frequency_hz

    with pytest.raises(AssertionError, match="no set_level"):
        test_each_real_driver_fills_its_role(roles.GeneratorRole, NoReadback)


@pytest.fixture(scope="module")
def sim_station(board, tmp_path_factory):
    """A simulated bench over loopback sockets, connected the way every command connects
    (connect_safe: every source safe first)."""
    tmp = tmp_path_factory.mktemp("roles")
    with sim_bench(board, tmp) as (bench, station_file):
        inst = connect_safe(load_station(station_file))
        try:
            yield bench, inst, tmp
        finally:
            inst.close()


def _context(sim_station, board, limits, options, progress=None):
    _bench, inst, tmp = sim_station
    fixture = load_fixture(FIXTURE_FILE, board, scope_inputs=4)
    store = open_store(tmp / "roles.db")
    ctx = steps.build_context(
        inst,
        board=board,
        limits=limits,
        fixture=fixture,
        serial="SN-ROLES",
        board_file=board.source,
        station="sim",
        store=store,
        options=options,
        progress=progress or RecordingProgress(),
    )
    return ctx, store


@pytest.mark.wire
def test_the_connected_station_fills_the_roles(sim_station):
    """Over sockets: each open driver is an instance of its runtime-checkable role."""
    _bench, inst, _tmp = sim_station
    assert isinstance(inst.generator, roles.GeneratorRole)
    assert isinstance(inst.scope, roles.ScopeRole)
    assert isinstance(inst.switch, roles.SwitchRole)
    assert isinstance(inst.dmm, roles.DmmRole)
    assert isinstance(inst.supply, roles.SupplyRole)
    assert roles.recoveries(inst) == 0


@pytest.mark.wire
def test_shared_steps_drive_the_simulated_bench(sim_station, board, limits):
    """The shared steps on a real simulated bench: power_up switches the supply on and
    reads its current, move_to ramps the generator on at the nominal level, the group
    acquisition records a sine whose quantisation matches the scope role's declared bits
    (steps of R / 2^N, adjacent codes present), and shutdown leaves the simulated
    generator's and supply's own outputs off."""
    bench, _inst, _tmp = sim_station
    ctx, store = _context(sim_station, board, limits, RunOptions(settle_wait_s=0.0))
    with store:
        ctx.log.begin(ctx.header())
        conn = ctx.fixture.channels[0]
        level = board.conditions.nominal_input_vrms
        gain = limits.channels[conn.board_channel].output_vrms_nominal / level
        try:
            with ctx.safe:
                assert ctx.supply is not None  # the demo fixture powers the board
                reading = steps.power_up(ctx, ctx.supply, 0.0)
                assert not reading.tripped and reading.current_a > 0
                plan = plan_record(
                    ctx.roles.scope,
                    board.conditions.frequency_hz,
                    max_points=20000,
                    max_record_s=(0.1,),
                    min_cycles=5,
                    tolerance_rel=0.01,
                )
                plan = ctx.scope.tune(plan, lambda f: ctx.safe.configure(f, level))
                assert steps.move_to(ctx, [(conn, gain)], level) is True
                assert steps.move_to(ctx, [(conn, gain)], level) is False  # nothing changed
                res, acq = ctx.scope.acquire([conn], plan)
        finally:
            steps.shutdown(ctx)
        store.finish_run(ctx.run_id, "aborted", None, "shared steps only, no verdict")
    a = res[conn.board_channel]
    assert a is not None and a.gain_db is not None
    bits = ctx.roles.scope.bits
    assert acq.bits == bits
    lo, hi = acq.adc_limits[conn.input_scope]
    lsb = (hi - lo) / (2**bits - 1)  # 2^N codes from the lowest to the highest
    codes = (np.asarray(acq.volts[conn.input_scope]) - lo) / lsb
    assert np.allclose(codes, np.round(codes), atol=1e-6)
    steps_seen = np.diff(np.unique(np.round(codes)))
    assert steps_seen.min() == 1  # no coarser converter hiding behind the declared bits
    # volts scaled with the declared bits read the level the generator reports (a wrong
    # bit count would scale them by a power of two); 5 %: scope gain accuracy plus the
    # generator's 50 ohm source into the board input (common practice)
    read_back = ctx.roles.generator.level_readback_vrms(output=ctx.fixture.generator_output)
    assert read_back is not None
    assert a.input_vrms == pytest.approx(read_back, rel=0.05)
    assert ctx.safe.output_state == "off" and ends_off(bench.generator_log)
    assert not any(o.on for o in bench.supply.outputs.values())
    assert bench.max_commanded_vpp(while_on=True) <= 2 * math.sqrt(2) * level * (1 + 1e-6)
    assert ctx.clock.instrument_s > 0  # every role call is timed


@pytest.mark.wire
def test_the_two_orders_are_made_of_the_same_steps(sim_station, board, limits):
    """Production and characterisation: one frame (perform), one shutdown, the same
    shared steps; each order lists its steps in the order the run takes them."""
    ctx_p, store_p = _context(sim_station, board, limits, RunOptions(settle_wait_s=0.0))
    ctx_c, store_c = _context(sim_station, board, limits, CharacterizeOptions(settle_wait_s=0.0))
    with store_p, store_c:
        prod = production_order(ProductionSteps(ctx_p, RunOptions(settle_wait_s=0.0)))
        char = characterisation_order(
            CharacterisationSteps(ctx_c, CharacterizeOptions(settle_wait_s=0.0))
        )
    assert prod.shutdown is char.shutdown is steps.shutdown
    for shared in ("move_to", "settle", "power_up", "perform", "build_context"):
        assert getattr(seq_mod, shared) is getattr(steps, shared)
        assert getattr(char_mod, shared) is getattr(steps, shared)
    assert [s.__name__ for s in prod.steps()] == [
        "precheck",
        "quiescent",
        "dc_points",
        "nominal",
        "clip_search",
        "frequencies",
        "shutdown",
    ]
    assert [s.__name__ for s in char.steps()] == [
        "supply_on",
        "level_sweep",
        "frequency_sweep",
        "compare",
        "shutdown",
    ]
    assert prod.release_step == "shutdown" and char.release_step is None
