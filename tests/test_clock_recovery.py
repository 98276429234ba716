"""Recovering the emulator's clock from captured output edges (dvgate.clock_recovery).

The edges are made from first principles: an emulator clock whose rising edge ``k`` is at
``phase + k * period`` in the analyzer's time base, output edges on those clock edges
(docs/timing.md: outputs are registered), and an analyzer that reports each edge at its
first sampling instant at or after it, the instants wandering by +/- the jitter.
"""

from __future__ import annotations

import numpy as np
import pytest

from dvgate.clock_recovery import ClockGrid, NoClock, recover_clock

T0 = 1e-6  # the config's clock: 1 MHz


def clock(ppm: float) -> float:
    """The period of a clock ``ppm`` fast against the analyzer's."""
    return T0 / (1 + ppm * 1e-6)


def bursts(count: int, gap: int, seed: int, pulses: int = 5, pitch: int = 7) -> np.ndarray:
    """Rise cycles of ``count`` bursts of 1 to ``pulses`` pulses, ``gap`` +/- 10 % cycles apart."""
    rng = np.random.default_rng(seed)
    out: list[int] = []
    at = 50
    for _ in range(count):
        at += int(gap + rng.integers(-gap // 10, gap // 10 + 1))
        out += [at + k * pitch for k in range(int(rng.integers(1, pulses + 1)))]
    return np.array(out)


def seen(true_times: np.ndarray, ts: float, jitter: float, seed: int) -> np.ndarray:
    """What an analyzer sampling every ``ts`` (instants +/- ``jitter``) reports for each edge.

    The sample ``k`` is reported at ``first + k ts`` but taken at that time plus its jitter;
    an edge shows at the first sample taken at or after it (``ts > 2 jitter``, so it is the
    sample ``k`` below or the next one).
    """
    rng = np.random.default_rng(seed + 1000)
    first = rng.uniform(0, ts)
    k = np.ceil((true_times - first - jitter) / ts)
    taken = first + k * ts + rng.uniform(-jitter, jitter, k.size)
    return first + np.where(taken >= true_times, k, k + 1) * ts


def recovered(result: ClockGrid | NoClock) -> ClockGrid:
    assert isinstance(result, ClockGrid), result
    return result


@pytest.mark.parametrize("ppm, gap, ts", [
    (80.0, 100, 0.37e-6),        # strobe every 100 cycles, 2.7 MHz analyzer
    (-95.0, 20_000, 0.21e-6),    # sparse: 20 000 cycles between bursts, past what 100 ppm can bridge
    (80.0, 120_000, 0.037e-6),   # 120 000 cycles between bursts, a fast analyzer
])
def test_clock_and_phase_of_asynchronous_edges(ppm: float, gap: int, ts: float) -> None:
    period, phase = clock(ppm), -0.3e-6
    cycles = bursts(60, gap, seed=3)
    jitter = 0.05 * ts
    edges = seen(phase + cycles * period, ts, jitter, seed=3)
    grid = recovered(recover_clock(edges, T0, ts, jitter, 100.0))
    assert grid.measured and grid.outliers == 0 and grid.edges == cycles.size
    # The truth within four standard errors, and the standard error small for the span.
    assert abs(grid.ppm - ppm) <= 4 * grid.ppm_error
    assert grid.ppm_error < 20.0
    # Every edge in the window of its own cycle, the window narrower than a clock period.
    numbers = grid.output_cycle(edges)
    assert np.all(np.diff(numbers) == np.diff(cycles))  # the cycle counts between edges are the truth's
    assert np.all(grid.on_grid(edges))
    assert grid.window[1] - grid.window[0] <= 2 * (ts + 2 * jitter) + 0.05 * T0
    # The clock edge that begins each edge's cycle lies in the offset range.
    true_clock = phase + cycles * period
    deviation = true_clock - grid.edge_time(numbers)
    assert np.all(deviation >= grid.offset[0]) and np.all(deviation <= grid.offset[1])


def test_input_edges_fall_in_the_cycles_the_grid_allows() -> None:
    ppm, ts = 80.0, 0.3713e-6
    period, phase = clock(ppm), 0.17e-6
    jitter = 0.05 * ts
    grid = recovered(recover_clock(seen(phase + bursts(80, 100, seed=5) * period, ts, jitter, seed=5),
                                   T0, ts, jitter, 100.0))
    rng = np.random.default_rng(9)
    pin = np.sort(rng.uniform(0.1e-3, 8e-3, 400))
    # docs/timing.md: an input changed between the clock edges beginning cycles e and e + 1 is seen in cycle e.
    truth = np.floor((pin - phase) / period).astype(np.int64)
    lo, hi = grid.input_range(seen(pin, ts, jitter, seed=9))
    offset = truth[0] - lo[0]  # the grid numbers its cycles from its own origin
    assert np.all((lo + offset <= truth) & (truth <= hi + offset))
    assert np.all(hi - lo <= 1)  # Ts + 2J under half a period: one or two cycles
    assert 0.2 < np.mean(hi > lo) < 0.8  # both happen
    # An exact time (not a sample) converts to its own cycle, unless it is so near a clock edge that
    # the clock's phase, known to the offset range, cannot tell.
    frac = ((pin - phase) / period) % 1.0
    clear = np.minimum(frac, 1 - frac) > (grid.offset[1] - grid.offset[0]) / period
    assert clear.mean() > 0.5
    assert np.all((grid.input_cycle(pin, observed=False) + offset == truth)[clear])


def test_simulated_edges_on_the_sample_grid_give_the_config_clock_exactly() -> None:
    # A simulator's VCD: edges at (k - 1/2) T exactly, resolution T / 2.
    edges = (bursts(30, 100, seed=1) - 0.5) * T0
    grid = recovered(recover_clock(edges, T0, T0 / 2, 0.0, 100.0))
    assert grid.ppm == pytest.approx(0.0, abs=1e-6)
    assert grid.window[0] == pytest.approx(-T0 / 2, abs=1e-12) and grid.window[1] == pytest.approx(T0 / 2, abs=1e-12)
    assert np.all(grid.edge_time(grid.output_cycle(edges)) == pytest.approx(edges, abs=1e-12))


def test_edges_off_the_grid_are_outliers() -> None:
    ts = 0.1e-6
    cycles = bursts(80, 100, seed=2)
    edges = seen(cycles * clock(40.0), ts, 0.0, seed=2)
    rng = np.random.default_rng(4)
    glitches = rng.uniform(edges[0], edges[-1], cycles.size // 20)  # 5 % ringing, anywhere
    grid = recovered(recover_clock(np.concatenate((edges, glitches)), T0, ts, 0.0, 100.0))
    assert abs(grid.ppm - 40.0) <= 4 * grid.ppm_error
    assert 0 < grid.outliers <= glitches.size


def test_far_off_clock_is_found_or_refused_never_mistaken() -> None:
    ts = 0.37e-6
    cycles = bursts(60, 100, seed=6)
    for ppm in (400.0, 3000.0):
        result = recover_clock(seen(cycles * clock(ppm), ts, 0.0, seed=6), T0, ts, 0.0, 100.0)
        if isinstance(result, ClockGrid):
            assert abs(result.ppm - ppm) <= 4 * result.ppm_error  # found where it is
        else:
            assert result.off_grid and "do not sit on one clock grid" in result.reason
    # Half the config's clock: every other grid point empty is fine, but a clock twice as fast puts
    # edges between the config's cycles: no grid fits.
    result = recover_clock(seen(cycles * T0 / 2 + 0.1e-6, 0.05e-6, 0.0, seed=6), T0, 0.05e-6, 0.0, 100.0)
    assert isinstance(result, NoClock) and result.off_grid


def test_what_cannot_be_recovered_is_said() -> None:
    coarse = recover_clock(np.arange(10) * 7e-6, T0, 0.6e-6, 0.0, 100.0)
    assert isinstance(coarse, NoClock) and not coarse.off_grid and "half a clock period" in coarse.reason
    empty = recover_clock(np.empty(0), T0, 0.1e-6, 0.0, 100.0)
    assert isinstance(empty, NoClock) and not empty.off_grid
    # One edge: its phase, not the period.
    one = recovered(recover_clock(np.array([3.2e-6]), T0, 0.1e-6, 0.0, 100.0))
    assert not one.measured and one.period == T0


def test_renumbered_grid_puts_the_start_in_cycle_one() -> None:
    grid = recovered(recover_clock(seen(bursts(20, 100, seed=8) * clock(10.0), 0.2e-6, 0.0, seed=8),
                                   T0, 0.2e-6, 0.0, 100.0))
    again = grid.renumbered(12.34e-6)
    assert int(again.input_cycle(12.34e-6, observed=False)) == 1
    shift = (again.origin - grid.origin) / grid.period
    assert shift == pytest.approx(round(shift), abs=1e-6)
