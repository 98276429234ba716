"""The host model: counters read once per computation cycle, liveness, counting load."""

import numpy as np
import pytest
from motionkit import fast_config

from dvgate.errors import UserError
from dvgate.sim.host import (
    HostSettings,
    PulseCounts,
    host_timing,
    host_view,
    pulse_counts,
    read_cycles,
)
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import stimulus_for
from dvgate.sim.trace import NEG, POS, Edge, RunResult, Status

CFG = fast_config()  # 1 MHz, strobe every 10 ms (10,000 cycles)
STATUS = Status(0, 0, False, False, False, False, False, 0, 0, 0, 0)


def test_timing_defaults_and_units():
    timing = host_timing(CFG)
    assert timing.cycle_cyc == 10_000  # 10 ms at 1 MHz
    assert timing.silence_cyc == 30_000  # three strobe periods
    assert timing.pulse_cost == pytest.approx(5e-6)
    assert timing.load_warning == pytest.approx(0.5)
    custom = host_timing(fast_config(host={"cycle": "20000 cycles", "silence": "25 ms", "pulse_cost": "2 us",
                                           "load_warning": "80 %"}))
    assert (custom.cycle_cyc, custom.silence_cyc, custom.load_warning) == (20_000, 25_000, pytest.approx(0.8))


def test_computation_cycle_shorter_than_the_strobe_period_is_an_error():
    with pytest.raises(UserError, match=r"fast\.toml: host\.cycle = '5 ms' \(5000 cycles\): allowed: at least the "
                                        r"strobe period, strobe\.period = '10 ms' \(10000 cycles\)"):
        host_timing(fast_config(host={"cycle": "5 ms"}))


@pytest.mark.parametrize(("section", "message"), [
    ({"cylce": "10 ms"}, r"unknown key 'host\.cylce'; did you mean 'host\.cycle'\?"),
    ({"pulse_cost": "5 parsecs"}, r"host\.pulse_cost.*unknown unit"),
    ({"load_warning": "0.5"}, r"host\.load_warning.*'<number> <unit>'"),
    ({"load_warning": "-5 %"}, r"host\.load_warning.*greater than zero"),
    ({"cycle": "0 ms"}, r"host\.cycle = '0 ms': allowed: at least 1 cycle"),
])
def test_bad_host_sections(section, message):
    with pytest.raises(UserError, match=message):
        host_timing(fast_config(host=section))


def test_counts_from_edges():
    edges = (Edge(0, POS, 10, 11), Edge(0, NEG, 12, 13), Edge(0, POS, 20, 21), Edge(1, NEG, 15, None))
    result = RunResult(30, edges, STATUS)
    counts = pulse_counts(result, np.array([9, 10, 15, 30]), 2)
    # a pulse counts from its rising edge on
    assert counts.counts[:, 0].tolist() == [[0, 0], [1, 0], [1, 1], [2, 1]]
    assert counts.counts[:, 1].tolist() == [[0, 0], [0, 0], [0, 1], [0, 1]]
    assert counts.net[:, 0].tolist() == [0, 1, 0, 1]
    with pytest.raises(ValueError, match="sample cycle"):
        counts.at(np.array([11]))
    with pytest.raises(ValueError, match="strictly"):
        PulseCounts(np.array([5, 5]), np.zeros((2, 1, 2)))


def synthetic(per_window_pos, per_window_neg, start=0, cycle=10_000):
    """Counts read every ``cycle`` for one channel, from pulses per window on each line."""
    pos = np.cumsum(per_window_pos)
    neg = np.cumsum(per_window_neg)
    cycles = start + cycle * np.arange(1, len(pos) + 1)
    counts = np.zeros((len(pos), 3, 2), dtype=np.int64)
    counts[:, 0, 0], counts[:, 0, 1] = pos, neg
    counts[:, 1:, :] = np.arange(1, len(pos) + 1)[:, None, None]  # the other channels stay alive
    return PulseCounts(cycles, counts)


def test_velocity_and_load():
    # 1000 pulses per 10 ms window is 100,000 pulses/s on that channel; at 2 us per
    # counted pulse that is 20 % of the computer's time (plus the other channels).
    timing = host_timing(fast_config(host={"pulse_cost": "2 us", "load_warning": "25 %"}))
    samples = synthetic([600, 600, 700], [400, 400, 300])
    view = host_view(samples, CFG, timing, start=0, stop=30_000)
    assert view.reads.tolist() == [10_000, 20_000, 30_000]
    assert view.counts[:, 0].tolist() == [200, 400, 800]
    np.testing.assert_allclose(view.velocity[:, 0], [2.0, 4.0, 8.0])  # 1 cm/s per pulse
    assert view.delta[:, 0].tolist() == [200, 200, 400]
    others = 2 * 2 / 0.01  # two more channels, one pulse per line per window
    np.testing.assert_allclose(view.pulse_rate, 100_000 + others)
    np.testing.assert_allclose(view.load, (100_000 + others) * 2e-6)
    assert not view.overloaded  # 20.08 % is below 25 %
    assert host_view(samples, CFG, host_timing(fast_config(host={"pulse_cost": "2.5 us", "load_warning": "25 %"})),
                     start=0, stop=30_000).overloaded  # 25.1 % is above


def test_liveness_alarm_raised_and_cleared():
    timing = host_timing(fast_config(host={"silence": "25 ms"}))
    # the negative line of channel x is silent for windows 3 to 6 (40 ms), then pulses again
    samples = synthetic([1] * 10, [1, 1, 0, 0, 0, 0, 1, 1, 1, 1])
    view = host_view(samples, CFG, timing, start=0, stop=100_000)
    (alarm,) = view.alarms
    assert (alarm.channel, alarm.line) == ("x", "neg")
    assert alarm.since == 20_000  # the last sample that saw it pulse
    assert alarm.raised == 50_000  # first sample more than 25 ms later
    assert alarm.cleared == 70_000
    assert host_view(samples, CFG, host_timing(fast_config(host={"silence": "25 ms", "liveness": False})),
                     start=0, stop=100_000).alarms == ()


def test_liveness_through_the_model_binary_scheme():
    # A binary scheme sends one pulse per strobe: at a rate of two pulses per strobe it can
    # only send positive ones, and the negative line falls silent.
    cfg = fast_config(pulses={"scheme": "binary", "width": "1 us", "gap": "1 us"},
                      channels=[{"name": "x", "rate": "2 g"}, {"name": "y"}, {"name": "z"}])
    stim = stimulus_for(cfg, 0.2)
    result = run_model(cfg.hw, stim)
    timing = host_timing(cfg)
    reads = read_cycles(timing, 0, stim.cycles)
    view = host_view(pulse_counts(result, reads, 3), cfg, timing, start=0, stop=stim.cycles)
    assert [(a.channel, a.line) for a in view.alarms] == [("x", "neg")]
    # y and z at zero input alternate lines: both stay alive
    assert view.counts[-1, 1] in (-1, 0, 1)


def test_settings_model():
    assert HostSettings().liveness is True
