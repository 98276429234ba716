"""ASCII timing diagrams of a run, one character per clock cycle.

Used by ``docs/timing.md`` (generated, and checked by a test so it stays true) and by
anything that shows a short window of a run to a person.
"""

from __future__ import annotations

from dvgate.params import HardwareParams
from dvgate.sim.model import armed_intervals, run_model, strobe_cycles
from dvgate.sim.trace import LINE_NAMES, RunResult, Stimulus

HIGH, LOW = "#", "_"


def _row(levels: list[bool]) -> str:
    return "".join(HIGH if level else LOW for level in levels)


def timing_diagram(params: HardwareParams, stim: Stimulus, result: RunResult, start: int, stop: int) -> str:
    """Rows for the strobe pin, the taken strobe, the armed state and each line, cycles ``start..stop-1``.

    Levels are logical (active shown high), whatever the configured polarities.
    """
    cycles = range(start, stop)
    edges = stim.strobe_edges
    pin = [sum(1 for e in edges if e <= k) % 2 == 1 for k in cycles]
    stbs = set(strobe_cycles(params, edges, stim.cycles))
    armed = armed_intervals(stim)
    rows = [
        ("cycle", "".join(str(k % 10) for k in cycles)),
        ("strobe pin", _row(pin)),
        ("stb (taken)", _row([k in stbs and any(a <= k < b for a, b in armed) for k in cycles])),
    ]
    for ch, name in enumerate(params.names):
        for line, line_name in enumerate(LINE_NAMES):
            spans = [(e.rise, e.fall if e.fall is not None else stim.cycles + 1)
                     for e in result.edges if e.channel == ch and e.line == line]
            rows.append((f"{name}_{line_name}", _row([any(r <= k < f for r, f in spans) for k in cycles])))
    width = max(len(label) for label, _ in rows)
    return "\n".join(f"{label:>{width}} {text}" for label, text in rows)


def documented_examples() -> str:
    """The diagrams of ``docs/timing.md``: each scheme, and an overrun, from the model.

    ``python -m dvgate.sim.diagram`` prints them; a test checks the document holds them.
    """
    base = dict(clock_hz=1e6, names=("x",), edge_rising=True, min_width_cyc=2, absence_cyc=1000, rest=0,
                width_cyc=2, gap_cyc=1, order="interleaved", active_low=False, frac_bits=8, rate_bits=12,
                owed_bits=8, clamp=4, backlog=20)
    cases = [
        ("burst, rest 1, interleaved, W = 2, G = 1, M = 2; rate 100/256 pulse per tick",
         dict(base, scheme="burst", rest=1, init_rates=(100,)), (4, 7, 30, 33), 60),
        ("burst, rest 1, grouped: the same strobes and rate",
         dict(base, scheme="burst", rest=1, order="grouped", init_rates=(100,)), (4, 7, 30, 33), 60),
        ("binary, rate -10/256: one pulse per strobe, by the sign of what is owed",
         dict(base, scheme="binary", backlog=1, init_rates=(-10,)), (2, 5, 14, 17, 26, 29, 38, 41, 50, 53), 60),
        ("ternary, rate 10/256: a pulse only when a whole one is owed",
         dict(base, scheme="ternary", backlog=1, init_rates=(10,)), (2, 5, 14, 17, 26, 29, 38, 41, 50, 53), 60),
        ("overrun: a strobe during a burst joins the backlog (burst, rest 2)",
         dict(base, scheme="burst", rest=2, init_rates=(60,)), (4, 7, 16, 19), 50),
    ]
    out = []
    for title, params_dict, edges, cycles in cases:
        params = HardwareParams(**params_dict)  # type: ignore[arg-type]
        stim = Stimulus(cycles=cycles, strobe_edges=edges)
        result = run_model(params, stim)
        out.append(f"{title}:\n\n```\n{timing_diagram(params, stim, result, 0, cycles)}\n```\n")
    return "\n".join(out)


if __name__ == "__main__":
    print(documented_examples())
