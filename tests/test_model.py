"""Hand-worked cases of docs/timing.md, checked on the reference model alone."""

from conftest import small_params

from dvgate.sim.books import conservation_errors
from dvgate.sim.model import armed_intervals, run_model, simulate, strobe_cycles
from dvgate.sim.trace import NEG, POS, Edge, RateChange, Stimulus


def pulses(result, line=None):
    return [(e.line, e.rise, e.fall) for e in result.edges if line is None or e.line == line]


def test_burst_worked_example():
    # rate 64/256 = 0.25 pulse per tick, armed from cycle 1; pin active 10..12 -> stb at 13 (M = 2).
    params = small_params()
    stim = Stimulus(cycles=60, strobe_edges=(10, 13, 30, 33))
    result = run_model(params, stim)
    # owed(13) = 12 ticks x 0.25 = 3 pulses: rest 1 + 3 positive, rest 1 negative, interleaved from positive;
    # pulses rise W + G = 3 cycles apart and last W = 2 cycles.
    first = [(POS, 14, 16), (NEG, 17, 19), (POS, 20, 22), (POS, 23, 25), (POS, 26, 28)]
    # owed(33) = 0.25 + 19 x 0.25 = 5 pulses, clamped to 4; the last line was positive, so negative first.
    second = [(NEG, 34, 36), (POS, 37, 39), (POS, 40, 42), (POS, 43, 45), (POS, 46, 48), (POS, 49, 51)]
    assert sorted(pulses(result), key=lambda p: p[1]) == first + second
    assert result.status.clamped and result.status.clamps == 1
    assert result.channels[0].owed == 1984  # 320 after the hand-over, then 26 ticks of 64
    assert conservation_errors(params, stim, result) == []


def test_latency_is_m_plus_2():
    for m in (1, 2, 5):
        params = small_params(min_width_cyc=m, init_rates=(0,))
        result = run_model(params, Stimulus(cycles=40, strobe_edges=(10, 10 + m)))
        assert min(e.rise for e in result.edges) == 10 + params.latency_cyc == 10 + m + 2


def test_glitch_shorter_than_filter_is_ignored():
    params = small_params(min_width_cyc=4)
    assert strobe_cycles(params, (10, 13, 20, 24), 100) == [20 + 4 + 1]
    assert strobe_cycles(params, (10,), 100) == [15]  # held active to the end of the run
    assert strobe_cycles(params, (10,), 15) == []  # not yet taken at the end


def test_binary_alternates_at_zero_rate():
    params = small_params(scheme="binary", rest=0, init_rates=(0,), backlog=1)
    edges = (5, 8, 25, 28, 45, 48, 65, 68)
    result = run_model(params, Stimulus(cycles=100, strobe_edges=edges))
    assert [e.line for e in sorted(result.edges, key=lambda e: e.rise)] == [POS, NEG, POS, NEG]


def test_ternary_sends_nothing_below_one_pulse():
    params = small_params(scheme="ternary", rest=0, init_rates=(10,), backlog=1)  # 10/256 pulse per tick
    edges = tuple(c for s in range(5, 200, 20) for c in (s, s + 3))
    result = run_model(params, Stimulus(cycles=200, strobe_edges=edges))
    # stb at 8, 28, 48, 68...: owed(28) = 27 x 10 = 270 >= 256 sends one pulse; owed(48) = 14 + 200 = 214
    # sends none; owed(68) = 414 sends one.
    assert [e.rise for e in result.edges][:2] == [29, 69]
    assert all(e.line == POS for e in result.edges)


def test_grouped_order():
    params = small_params(order="grouped", rest=2, init_rates=(256,), clamp=8)
    result = run_model(params, Stimulus(cycles=80, strobe_edges=(3, 6)))
    lines = [e.line for e in sorted(result.edges, key=lambda e: e.rise)]
    # owed(6) = 5 ticks: 2 + 5 positive first, then 2 negative
    assert lines == [POS] * 7 + [NEG] * 2


def test_overrun_joins_backlog_and_defers_past_limit():
    params = small_params(rest=1, init_rates=(0,), backlog=4, clamp=2)
    # strobes every 4 cycles; each hands 2 rest pulses taking 6 cycles
    edges = tuple(c for s in range(0, 40, 4) for c in (s, s + 2))
    run = simulate(params, Stimulus(cycles=60, strobe_edges=edges))
    status = run.result.status
    assert status.overrun and status.overruns > 0
    assert status.deferred and status.deferrals > 0
    assert max(e.pend_pos + e.pend_neg for e in run.result.channels) <= params.backlog
    assert run.counts[0][0] == run.counts[0][1]  # rest pulses only, and none lost in half


def test_saturation_is_counted():
    params = small_params(init_rates=(2047,), owed_bits=4, clamp=1, rest=0)  # owed holds at most 8 pulses
    result = run_model(params, Stimulus(cycles=50, strobe_edges=()))
    assert result.status.saturated
    assert result.channels[0].owed == params.owed_max
    # 2047 per tick from cycle 1 passes 2047 (the limit) on the second tick: cycles 2..49 saturate
    assert result.status.saturations == 48


def test_disarm_cuts_pulse_and_clears():
    params = small_params(init_rates=(256,), rest=0, width_cyc=4, gap_cyc=1, clamp=4)
    stim = Stimulus(cycles=40, strobe_edges=(3, 6), arm_changes=((0, True), (9, False)))
    result = run_model(params, stim)
    # stb at 6, owed 5 pulses (cycles 1..5), clamped to 4; first pulse 7..11, cut at the first disarmed cycle 10
    assert pulses(result) == [(POS, 7, 10)]
    assert result.channels[0].owed == 0 and result.channels[0].pend_pos == 0
    assert armed_intervals(stim) == [(1, 10)]


def test_rearm_starts_fresh():
    params = small_params(init_rates=(64,), rest=0)
    stim = Stimulus(cycles=80, strobe_edges=(50, 53), arm_changes=((0, True), (20, False), (30, True)))
    result = run_model(params, stim)
    # armed again from 31: owed(53) = 22 ticks x 0.25 = 5.5 -> 4 (clamp); books balance since re-arming
    assert len(result.edges) == 4
    assert conservation_errors(params, stim, result) == []


def test_rate_change_mid_burst_and_status():
    params = small_params(rest=2, init_rates=(128,), absence_cyc=30)
    stim = Stimulus(cycles=100, strobe_edges=(10, 13, 40, 43), rate_changes=(RateChange(15, 0, -200),))
    result = run_model(params, stim)
    assert conservation_errors(params, stim, result) == []
    assert result.status.strobes == 2
    assert result.status.period == 30
    assert result.status.host_absent  # last strobe at 43: 56 cycles without one at cycle 100
    assert Edge(0, NEG, 14, 16) not in result.edges  # interleaved starts positive


def test_three_rest_pulses_on_each_line_at_zero_input():
    # Three rest pulses on each line at zero input: common practice, no source (the example config).
    from dvgate.config import load_config
    from dvgate.sim.stimulus import stimulus_for

    config = load_config("dvgate/examples/bench.toml", weight="0.01 m/s")
    hw = config.hw
    params = type(hw)(**{**hw.__dict__, "init_rates": (0,) * hw.n})
    run = simulate(params, stimulus_for(config, 0.0105))  # ten strobes
    assert run.counts == [(30, 30)] * hw.n
