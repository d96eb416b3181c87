"""SafeGenerator and SupplyGuard with fake drivers: refusal, ramps, off on every exit."""

from __future__ import annotations

import itertools
import math
import os
import signal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from harness.errors import ConnectionLost, SafetyError
from harness.run.safety import SafeGenerator, SupplyGuard, Terminated, sigterm_raises


class FakeGenerator:
    """Records what a generator driver was asked to do."""

    def __init__(self, fail_off: bool = False, fail_all: bool = False) -> None:
        self.levels: list[float] = []
        self.on = False
        self.fail_off = fail_off
        self.fail_all = fail_all
        self.trace: list[tuple[str, float]] = []

    def configure_sine(self, frequency_hz: float, output: int = 1) -> None:
        self.trace.append(("freq", frequency_hz))

    def set_level(self, vrms: float, *, load_ohm: float = math.inf, output: int = 1) -> None:
        assert load_ohm == math.inf
        self.levels.append(vrms)
        self.trace.append(("level", vrms))

    def level_readback_vrms(self, *, load_ohm: float = math.inf, output: int = 1) -> float | None:
        return None  # like a profile without query_amplitude

    def output(self, on: bool, output: int = 1) -> None:
        if self.fail_all or (self.fail_off and not on):
            raise ConnectionLost("gone", resource="TCPIP::127.0.0.1::1::SOCKET")
        self.on = on
        self.trace.append(("on" if on else "off", 0.0))

    def is_on(self, output: int = 1) -> bool:
        if self.fail_all:
            raise ConnectionLost("gone")
        return self.on

    def safe_off(self) -> None:
        if not self.fail_all:
            self.on = False


def test_refuses_above_safe_level_and_sends_nothing():
    g = FakeGenerator()
    with SafeGenerator(g, 0.6) as sg:
        with pytest.raises(SafetyError, match="safe input level"):
            sg.set_level(0.61)
        with pytest.raises(SafetyError):
            sg.set_level(float("nan"))
        with pytest.raises(SafetyError):
            sg.set_level(-0.1)
    assert g.levels == []
    assert not g.on


def test_ramp_up_in_steps_down_at_once():
    """Rises above the direct level go in <= 6 dB steps while the output is on."""
    g = FakeGenerator()
    with SafeGenerator(g, 0.6, direct_vrms=0.05) as sg:
        sg.configure(1000.0, 0.05)
        sg.on()
        sg.set_level(0.6)
        ups = g.levels[1:]
        assert ups[-1] == pytest.approx(0.6)
        seq = [0.05, *ups]
        for a, b in itertools.pairwise(seq):
            assert 20 * math.log10(b / a) <= 6.0 + 1e-9
        n = len(g.levels)
        sg.set_level(0.01)  # down: one step
        assert g.levels[n:] == [0.01]
    assert not g.on
    assert max(g.levels) <= 0.6


def test_on_lowers_then_ramps_a_level_set_while_off():
    g = FakeGenerator()
    sg = SafeGenerator(g, 1.0, direct_vrms=0.1)
    with sg:
        sg.set_level(0.8)  # output off: applied directly, no signal flows
        assert g.levels == [0.8]
        sg.on()
        # on() first drops to the direct level, switches on, ramps back up to 0.8
        i_on = g.trace.index(("on", 0.0))
        assert g.trace[i_on - 1] == ("level", 0.1)
        assert g.levels[-1] == pytest.approx(0.8)
        assert len(g.levels) >= 4


@given(levels=st.lists(st.floats(0, 2.0), min_size=1, max_size=20))
@settings(max_examples=40, deadline=None)
def test_never_commands_above_safe(levels):
    """Whatever the sequence asks, the driver never sees more than the safe level, every
    rise is at most 6 dB above the previous level once above the direct level, and the
    output ends off."""
    g = FakeGenerator()
    with SafeGenerator(g, 0.6, direct_vrms=0.05) as sg:
        sg.configure(1000.0, 0.05)
        sg.on()
        for v in levels:
            try:
                sg.set_level(v)
            except SafetyError:
                assert v > 0.6
    assert all(v <= 0.6 for v in g.levels)
    prev = 0.05
    for v in g.levels[1:]:
        if v > max(prev, 0.05):
            assert 20 * math.log10(v / max(prev, 0.05)) <= 6.0 + 1e-9
        prev = v
    assert not g.on


def test_off_on_exception_and_keyboard_interrupt():
    for exc in (RuntimeError("boom"), KeyboardInterrupt()):
        g = FakeGenerator()
        with pytest.raises(type(exc)), SafeGenerator(g, 1.0) as sg:
            sg.configure(1000.0, 0.1)
            sg.on()
            raise exc
        assert not g.on
        assert sg.output_state == "off"


def test_unreachable_generator_state_unknown():
    g = FakeGenerator()
    sg = SafeGenerator(g, 1.0)
    with sg:
        sg.configure(1000.0, 0.1)
        sg.on()
        g.fail_all = True
    assert sg.output_state == "unknown"


def test_sigterm_raises_inside_run():
    g = FakeGenerator()
    with pytest.raises(Terminated), sigterm_raises(), SafeGenerator(g, 1.0) as sg:
        sg.configure(1000.0, 0.1)
        sg.on()
        os.kill(os.getpid(), signal.SIGTERM)  # the handler raises at the next bytecode
        for _ in range(10_000):
            pass
    assert not g.on
    assert signal.getsignal(signal.SIGTERM) is signal.SIG_DFL  # handler restored


class FakeSupply:
    def __init__(self) -> None:
        self.on: dict[int, bool] = {}
        self.config: dict[int, tuple[float, float]] = {}

    def configure(self, voltage_v: float, current_limit_a: float, output: int = 1) -> None:
        self.config[output] = (voltage_v, current_limit_a)

    def output(self, on: bool, output: int = 1) -> None:
        self.on[output] = on

    def is_on(self, output: int = 1) -> bool:
        return self.on.get(output, False)

    def current_a(self, output: int = 1) -> float:
        return 0.01

    def tripped(self, output: int = 1) -> bool:
        return False

    def safe_off(self) -> None:
        self.on = dict.fromkeys(self.on, False)


def test_supply_guard_limits_and_off():
    s = FakeSupply()
    with pytest.raises(RuntimeError), SupplyGuard(s, 15.0, 0.05, 1, negative=(2, -15.0)) as sup:
        sup.on()
        assert s.config == {1: (15.0, 0.05), 2: (15.0, 0.05)}
        assert s.on == {1: True, 2: True}
        raise RuntimeError("x")
    assert s.on == {1: False, 2: False}


# --- every rise ramps; every switch-off is read back; the level is read back ----------------


def test_every_rise_while_on_ramps_from_the_present_level():
    """A rise below the nominal level is ramped too: 5 mV -> 50 mV (20 dB) goes in <= 6 dB
    steps, not in one jump (the README's promise: every rise while on)."""
    g = FakeGenerator()
    with SafeGenerator(g, 0.6, direct_vrms=0.05) as sg:
        sg.configure(1000.0, 0.005)
        sg.on()
        start = len(g.levels)
        sg.set_level(0.05)
        seq = [0.005, *g.levels[start:]]
        assert seq[-1] == pytest.approx(0.05)
        assert len(seq) >= 5  # 20 dB in 6 dB steps: 4 steps
        for a, b in itertools.pairwise(seq):
            assert 20 * math.log10(b / a) <= 6.0 + 1e-9


def test_switch_on_never_above_direct_level():
    g = FakeGenerator()
    with SafeGenerator(g, 0.6, direct_vrms=0.05) as sg:
        sg.configure(1000.0, 0.5)
        sg.on()
        i_on = g.trace.index(("on", 0.0))
        assert g.trace[i_on - 1] == ("level", 0.05)


def test_ramp_step_above_6_db_refused():
    with pytest.raises(SafetyError, match="6 dB"):
        SafeGenerator(FakeGenerator(), 0.6, max_step_up_db=10.0)


class IgnoresOff(FakeGenerator):
    """A generator whose profile's output_off does nothing; its state reads back true."""

    def output(self, on: bool, output: int = 1) -> None:
        if on:
            self.on = True
        self.trace.append(("on" if on else "off", 0.0))

    def safe_off(self) -> None:  # the driver's safe_off uses the same output_off
        pass


def test_ignored_off_is_unknown_never_off_and_stops():
    """Off is read back: an output that still reads on is 'unknown' (and said), and a
    switch-off inside the run raises SafetyError instead of going on."""
    g = IgnoresOff()
    alarms: list[str] = []
    sg = SafeGenerator(g, 1.0, on_alarm=alarms.append)
    with sg:
        sg.configure(1000.0, 0.1)
        sg.on()
        with pytest.raises(SafetyError, match="not confirmed off"):
            sg.off()
        assert sg.output_state == "unknown"
    assert sg.output_state == "unknown"
    assert g.on  # what the instrument really does
    assert any("still reads ON" in a for a in alarms)


def test_safe_off_confirmed_by_read_back():
    g = FakeGenerator()
    sg = SafeGenerator(g, 1.0)
    with sg:
        sg.configure(1000.0, 0.1)
        sg.on()
    assert sg.output_state == "off" and not g.on


class ReadsBack(FakeGenerator):
    """A generator that reports its level; ``extra`` V rms come on top (a profile that
    smuggles a second setting past the wrapper)."""

    def __init__(self, extra: float = 0.0) -> None:
        super().__init__()
        self.extra = extra
        self.level = 0.0

    def set_level(self, vrms: float, *, load_ohm: float = math.inf, output: int = 1) -> None:
        super().set_level(vrms, load_ohm=load_ohm, output=output)
        self.level = vrms + self.extra

    def level_readback_vrms(self, *, load_ohm: float = math.inf, output: int = 1) -> float:
        return self.level


def test_level_read_back_mismatch_stops_before_the_output_is_on():
    g = ReadsBack(extra=1.7)  # 1.75 V rms where 0.05 was asked: 2.9 x the safe level
    sg = SafeGenerator(g, 0.6, direct_vrms=0.05)
    with sg, pytest.raises(SafetyError, match=r"reports 1\.75 V rms after 0\.05"):
        sg.configure(1000.0, 0.05)
    assert not g.on and sg.output_state == "off"
    assert ("on", 0.0) not in g.trace


def test_level_read_back_within_resolution_passes():
    g = ReadsBack(extra=0.0004)  # under the 0.5 mV rms allowance for setting resolution
    with SafeGenerator(g, 0.6, direct_vrms=0.05) as sg:
        sg.configure(1000.0, 0.05)
        sg.on()
    assert not g.on


def test_resync_after_a_station_recovery_ramps_back_on():
    """A lost instrument switches the generator off first (connect_safe's recovery hook);
    the wrapper sees the station's recovery count move and brings the output back, ramped
    from the switch-on level."""
    g = FakeGenerator()
    count = [0]
    with SafeGenerator(g, 0.6, direct_vrms=0.05, disturbances=lambda: count[0]) as sg:
        sg.configure(1000.0, 0.05)
        sg.on()
        sg.set_level(0.4)
        g.on = False  # the recovery hook switched it off
        count[0] += 1
        n = len(g.levels)
        assert sg.resync() is True
        assert g.on and g.levels[n] == pytest.approx(0.05) and g.levels[-1] == pytest.approx(0.4)
        assert sg.resync() is False


class ReadBackSupply(FakeSupply):
    def __init__(self, ignore_off: bool = False) -> None:
        super().__init__()
        self.ignore_off = ignore_off

    def output(self, on: bool, output: int = 1) -> None:
        if on or not self.ignore_off:
            self.on[output] = on

    def safe_off(self) -> bool:
        if not self.ignore_off:
            self.on = dict.fromkeys(self.on, False)
        return not any(self.on.values())


def test_supply_off_is_read_back():
    s = ReadBackSupply(ignore_off=True)
    sup = SupplyGuard(s, 12.0, 0.05, 1)
    sup.on()
    with pytest.raises(SafetyError, match="not confirmed off"):
        sup.off()
    assert sup.output_state == "unknown"
    assert sup.safe_off() == "unknown"
    ok = ReadBackSupply()
    good = SupplyGuard(ok, 12.0, 0.05, 1)
    good.on()
    assert good.safe_off() == "off"
