"""Rate programs: integrals within one LSB x segment ticks at every boundary, for any run length."""

from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from motionkit import fast_config
from scipy.integrate import cumulative_trapezoid

from dvgate.errors import UserError
from dvgate.sim.profile import Profile, read_csv
from dvgate.sim.program import (
    ProgramSettings,
    _quantize_clipped,
    check_program,
    load_program,
    make_program,
    program_settings,
    save_program,
)

# The example board's clock: 12 MHz, so one 1 ms segment is 12,000 ticks.
CFG = fast_config(clock="12 MHz")
NAMES = ("x", "y", "z")
UNITS = ("m/s^2",) * 3


def fixed(cfg, si):
    """SI velocity (m/s) in the program's fixed-point units (LSB x ticks), per channel."""
    return si / np.array([c.weight for c in cfg.channels]) * 2.0 ** cfg.hw.frac_bits


def sine_profile(seconds, dt, amp=5.0, omega=1.3, offset=0.0):
    t = np.arange(0.0, seconds + dt / 2, dt)
    v = offset + amp * np.sin(omega * t)
    return Profile(t, np.column_stack([v, -v, 0.5 * v]), NAMES, UNITS), amp, omega


def test_sine_against_trapezoid_and_analytic():
    profile, amp, omega = sine_profile(100.0, 1e-3)
    program = make_program(profile, CFG)
    seg = program.segment_ticks
    assert seg == 12_000
    ticks = np.arange(0, program.total_ticks + 1, seg)
    exact = program.integral(ticks).astype(float)
    t = ticks / CFG.clock_hz
    # scipy.integrate.cumulative_trapezoid on the 1 ms grid is the profile's own integral
    # there: the program must match it within one LSB x the ticks of one segment.
    trap = cumulative_trapezoid(profile.values, profile.time, axis=0, initial=0.0)
    assert np.abs(exact - fixed(CFG, trap)).max() <= seg
    # Against the analytic integral of A sin(wt): the same, plus the profile's sampling
    # error (linear interpolation errs by at most A w^2 dt^2 / 8 per unit time).
    analytic = amp / omega * (1.0 - np.cos(omega * t))
    sampling = amp * omega ** 2 * 1e-6 / 8 * t[-1]
    got = exact[:, 0] / 2.0 ** CFG.hw.frac_bits * 0.01
    assert np.abs(got - analytic).max() <= sampling + seg * 0.01 / 2.0 ** CFG.hw.frac_bits
    assert program.worst_error <= 0.5


def test_no_drift_over_ten_hours():
    # A ten-hour profile cut into 100 ms segments (360,000 of them): the error at every
    # boundary stays within half a segment's LSB x ticks; rounding each segment on its
    # own, without carrying the residual, drifts far beyond one.
    cfg = fast_config(clock="12 MHz", program={"segment": "100 ms"})
    profile, _, _ = sine_profile(36_000.0, 1.0, amp=0.2, omega=0.01, offset=0.0301)
    program = make_program(profile, cfg)
    seg = program.segment_ticks
    ticks = np.arange(0, program.total_ticks + 1, seg)
    want = fixed(cfg, profile.integral(ticks / cfg.clock_hz))
    err = program.integral(ticks).astype(float) - want
    assert np.abs(err).max() <= 0.5 * seg * 1.001
    bounds = ticks / cfg.clock_hz
    naive = np.rint(fixed(cfg, profile.interval_integrals(bounds)) / seg) * seg
    drift = np.abs(np.cumsum(naive, axis=0) - want[1:]).max()
    assert drift > 10 * seg


def exact_integral(time, values, upto):
    """The piecewise-linear profile's integral from time[0] to ``upto``, in Fractions."""
    total = Fraction(0)
    for k in range(len(time) - 1):
        t0, t1 = Fraction(time[k]), Fraction(time[k + 1])
        if t1 <= t0 or upto <= t0:
            continue
        hi = min(t1, upto)
        v0, v1 = Fraction(values[k]), Fraction(values[k + 1])
        slope = (v1 - v0) / (t1 - t0)
        total += v0 * (hi - t0) + slope * (hi - t0) ** 2 / 2
    return total


@settings(max_examples=40, deadline=None)
@given(
    steps=st.lists(st.tuples(st.floats(0.0005, 0.02), st.floats(-150.0, 150.0)), min_size=1, max_size=12),
    first=st.floats(-150.0, 150.0),
    segment=st.integers(1, 3000),
)
def test_bound_at_boundaries_of_random_profiles(steps, first, segment):
    cfg = fast_config(program={"segment": f"{segment} cycles"})
    time = np.concatenate(([0.0], np.cumsum([s[0] for s in steps])))
    vals = np.array([first] + [s[1] for s in steps])
    profile = Profile(time, np.column_stack([vals, -vals, vals / 3]), NAMES, UNITS)
    program = make_program(profile, cfg)
    starts = program.starts
    every = np.unique(np.concatenate((np.arange(0, program.total_ticks, segment), [program.total_ticks])))
    boundaries = np.unique(np.concatenate((every[:: max(1, len(every) // 40)], every[-2:])))  # about 40 of them
    got = program.integral(boundaries)
    scale = Fraction(2 ** cfg.hw.frac_bits) / Fraction(0.01)
    for row, tick in enumerate(boundaries.tolist()):
        upto = min(Fraction(tick) / Fraction(int(cfg.clock_hz)), Fraction(time[-1]))
        want = exact_integral(time, vals, upto) * scale
        for ch, sign in enumerate((1, -1, Fraction(1, 3))):
            # one LSB x the ticks of one segment, with room for float rounding of the target
            assert abs(got[row, ch] - want * sign) <= Fraction(segment, 2) * Fraction(1001, 1000) + 1
    assert starts[-1] == program.total_ticks


def test_over_range_is_an_error_with_time_and_channel():
    t = np.array([0.0, 1.0, 2.0])
    z = np.array([0.0, 17.0, 0.0]) * 9.80665  # 17 g on a 16 g channel
    profile = Profile(t, np.column_stack([0 * t, 0 * t, z]), NAMES, UNITS, source="flight.toml")
    with pytest.raises(UserError, match=r"flight\.toml: t = 1 s, channel 'z': \+166\.713 m/s\^2 \(\+17 g\) is beyond "
                                        r"the full scale of \+/-156\.906 m/s\^2 \(16 g\)"):
        make_program(profile, CFG)


def test_over_range_in_a_csv_names_line_and_column(tmp_path):
    path = tmp_path / "p.csv"
    path.write_text("time [s], x [g], y [g], z [g]\n0, 0, 0, 1\n1, 0, -20, 1\n2, 0, 0, 1\n")
    profile = read_csv(path, CFG.channels)
    with pytest.raises(UserError, match=r"p\.csv: line 3, column 'y' \(t = 1 s\): -196\.133 m/s\^2 \(-20 g\)"):
        make_program(profile, CFG)


def test_over_range_clamped_and_reported():
    cfg = fast_config(clock="12 MHz", program={"over_range": "clamp"})
    t = np.array([0.0, 1.0, 1.0, 2.0, 3.0])
    z = np.array([0.0, 0.0, 20.0, 20.0, 0.0]) * 9.80665
    profile = Profile(t, np.column_stack([0 * t, 0 * t, z]), NAMES, UNITS)
    program = make_program(profile, cfg)
    (report,) = program.over_range
    assert (report.channel, report.samples, report.first, report.last) == ("z", 2, 1.0, 2.0)
    assert report.peak == pytest.approx(20 * 9.80665)
    limit = 16 * 9.80665
    clipped = Profile(t, np.column_stack([0 * t, 0 * t, np.clip(z, -limit, limit)]), NAMES, UNITS)
    want = fixed(cfg, clipped.integral([3.0]))[0, 2]
    assert abs(float(program.integral(program.total_ticks)[0, 2]) - want) <= program.segment_ticks / 2 + 1


def test_rate_changes_follow_the_program():
    cfg = fast_config()
    one, two = 4_000_000, 9_000_000  # whole rates: no residual to carry
    t = np.array([0.0, 0.002, 0.002, 0.004])
    x = np.array([cfg.fixed_to_rate(0, one)] * 2 + [cfg.fixed_to_rate(0, two)] * 2)
    profile = Profile(t, np.column_stack([x, 0 * x, 0 * x]), NAMES, UNITS)
    program = make_program(profile, cfg)
    assert program.segment_ticks == 1000 and program.total_ticks == 4000
    assert len(program.ticks) == 2  # four 1 ms segments, merged where equal
    changes = program.rate_changes(5, cfg.hw.rates)
    assert [(c.cycle, c.channel, c.rate) for c in changes] == [(5, 0, one), (2005, 0, two), (4005, 0, 0)]
    assert list(program.segments()) == [(2000, (one, 0, 0)), (2000, (two, 0, 0))]
    with pytest.raises(ValueError):
        program.rate_changes(0)


def test_clipped_rates_carry_the_residual():
    # Segments asking for more than the register holds: clipped, and the residual is
    # paid back as soon as the profile allows.
    wanted = np.array([[350.0], [350.0], [0.0], [0.0]])
    rates, errors, clips = _quantize_clipped(wanted, np.array([10, 10, 10, 10]), -20, 20)
    assert clips == 3
    assert rates[:, 0].tolist() == [20, 20, 20, 10]
    assert float(errors[-1, 0]) == 0.0


def test_save_load_and_check(tmp_path):
    profile, _, _ = sine_profile(0.5, 1e-3)
    program = make_program(profile, CFG)
    path = save_program(program, tmp_path / "p.npz")
    back = load_program(path)
    assert np.array_equal(back.ticks, program.ticks) and np.array_equal(back.rates, program.rates)
    assert (back.names, back.frac_bits, back.clock_hz) == (program.names, program.frac_bits, program.clock_hz)
    check_program(back, CFG)
    with pytest.raises(UserError, match="clock 1.2e\\+07 Hz against 1e\\+06 Hz"):
        check_program(back, fast_config())
    (tmp_path / "bad.npz").write_bytes(b"not a program")
    with pytest.raises(UserError, match="not a dvgate program"):
        load_program(tmp_path / "bad.npz")
    with pytest.raises(UserError, match="no such file"):
        load_program(tmp_path / "absent.npz")


def test_program_section_is_checked():
    assert program_settings(CFG) == ProgramSettings()
    with pytest.raises(UserError, match=r"unknown key 'program\.segmnt'; did you mean 'program\.segment'\?"):
        program_settings(fast_config(program={"segmnt": "1 ms"}))
    with pytest.raises(UserError, match=r"program\.over_range"):
        program_settings(fast_config(program={"over_range": "ignore"}))
    profile, _, _ = sine_profile(0.01, 1e-3)
    with pytest.raises(UserError, match=r"program\.segment = '10 ns'"):
        make_program(profile, fast_config(program={"segment": "10 ns"}))


@pytest.mark.parametrize("chunk", [1, 3, 1000])
def test_program_made_in_chunks_is_the_same(monkeypatch, chunk):
    # A long profile is converted a chunk of segments at a time (bounded memory); the
    # running sums are carried, so the rates and the worst error are the same bits.
    from dvgate.sim import program as module

    profile, _, _ = sine_profile(2.0, 1e-3, amp=40.0, omega=7.0, offset=3.0)
    cfg = fast_config(clock="12 MHz", program={"segment": "0.7 ms"})  # the last segment is short
    whole = make_program(profile, cfg)
    monkeypatch.setattr(module, "SEGMENT_CHUNK", chunk)
    parts = make_program(profile, cfg)
    assert np.array_equal(parts.ticks, whole.ticks) and np.array_equal(parts.rates, whole.rates)
    assert parts.worst_error == whole.worst_error and parts.register_clips == whole.register_clips == 0


@pytest.mark.parametrize("chunk", [1, 2, 5])
def test_clipped_quantizer_in_chunks_carries_the_residual(chunk):
    from dvgate.sim.program import _quantize_clipped_all

    rng = np.random.default_rng(3)
    lengths = np.array([10] * 11 + [4])
    wanted = rng.normal(0.0, 300.0, (12, 2))
    rates, errors, clips = _quantize_clipped(wanted, lengths, -20, 20)
    got, worst, got_clips = _quantize_clipped_all(lambda a, b: wanted[a:b], lengths, -20, 20, chunk)
    assert clips > 0 and got_clips == clips
    assert np.array_equal(got, rates)
    assert worst == float(np.max(np.abs(errors) / lengths[:, None]))


@pytest.mark.parametrize("rate", [3, 1 << 40])
def test_integral_is_exact_in_python_integers(rate):
    # Small products are summed in int64, large ones (2**40 x 2**30 ticks overflows
    # int64) in Python integers: either way every value is the exact sum.
    from dvgate.sim.program import Program

    ticks = [1 << 30, 7, 1 << 30, 5]
    rates = [[rate, -rate], [1 - rate, rate], [rate, 2], [0, -rate]]
    program = Program(np.array(ticks), np.array(rates), ("x", "y"), 36, 12e6, (0.01, 0.01), 1 << 30)
    at = [0, 1, 1 << 30, (1 << 30) + 3, (1 << 31) + 7, (1 << 31) + 12, (1 << 31) + 20]
    got = program.integral(at)
    for row, t in enumerate(at):
        for ch in range(2):
            want, left = 0, t
            for n, r in zip(ticks, rates, strict=True):
                want += r[ch] * min(n, max(left, 0))
                left -= n
            assert got[row, ch] == want and type(got[row, ch]) is int


def test_rate_changes_are_arrays_that_read_as_records():
    from dvgate.sim.trace import RateChange, RateChanges

    cfg = fast_config()
    t = np.array([0.0, 0.002, 0.002, 0.004])
    x = np.array([cfg.fixed_to_rate(0, 4_000_000)] * 2 + [cfg.fixed_to_rate(0, 9_000_000)] * 2)
    program = make_program(Profile(t, np.column_stack([x, x / 2, 0 * x]), NAMES, UNITS), cfg)
    changes = program.rate_changes(5)  # no initial rates: every channel is written first
    assert isinstance(changes, RateChanges)
    want = (RateChange(5, 0, 4_000_000), RateChange(5, 1, 2_000_000), RateChange(5, 2, 0),
            RateChange(2005, 0, 9_000_000), RateChange(2005, 1, 4_500_000),
            RateChange(4005, 0, 0), RateChange(4005, 1, 0))
    assert changes == want and tuple(changes) == want and changes[3] == want[3] and changes[-2:] == want[-2:]
    assert changes.cycle.tolist() == [c.cycle for c in want]
