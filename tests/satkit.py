"""Shared helpers for the saturation tests: stimuli that make owed amounts saturate
around every kind of strobe, and a check that a run covers the rule of docs/timing.md."""

from __future__ import annotations

import random

from dvgate.params import HardwareParams
from dvgate.sim.model import ModelRun
from dvgate.sim.trace import RateChange, Stimulus


def saturating_stimulus(params: HardwareParams, rng: random.Random, cycles: int) -> Stimulus:
    """Strobes, large rate swings, arming and disarming and ignore windows, so that owed
    amounts saturate before taken, ignored and disarmed strobes and after the last one."""
    edges, t = [], rng.randint(0, 10)
    while t < cycles:
        edges += [t, t + params.min_width_cyc + rng.randint(0, 2)]
        t = edges[-1] + rng.randint(1, 40)
    changes, c = [], rng.randint(params.n + 1, 30)
    while c < cycles:
        ch = rng.randrange(params.n)
        changes.append(RateChange(c, ch, rng.choice([params.rate_min, params.rate_max, rng.randint(-300, 300)])))
        c += params.n + 1 + rng.randint(0, 30)
    arms, a = [(0, True)], rng.randint(30, 120)
    while a < cycles:
        arms.append((a, not arms[-1][1]))
        a += rng.randint(10, 120)
    windows, w = [], rng.randint(1, 60)
    while w < cycles:
        windows.append((w, rng.randint(1, 50)))
        w += rng.randint(60, 200)
    return Stimulus(cycles=cycles, strobe_edges=tuple(e for e in edges if e < cycles), rate_changes=tuple(changes),
                    arm_changes=tuple(arms), ignore_windows=tuple(windows))



def assert_covers_the_rule(run: ModelRun) -> None:
    """The model's run has takes that count and takes that do not, marks that wait through
    ignored and through disarmed strobes, and a saturation after the last take."""

    def carried(strobes: list[int]) -> int:
        """Strobes among ``strobes`` before which a mark made since the previous take waits."""
        out = 0
        for u in strobes:
            prev = max([t for t in run.takes if t < u], default=0)
            out += any(a < u and b > prev for a, b in run.sat_spans)
        return out

    disarmed = [s for s in run.strobes if s not in run.takes and s not in run.ignored]
    assert 0 < run.result.status.saturations < len(run.takes)
    assert carried(run.ignored) and carried(disarmed)
    assert run.sat_spans[-1][1] > run.takes[-1]
