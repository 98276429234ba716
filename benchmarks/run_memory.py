"""Peak memory and wall time of ``dvgate run``: the edge path against the counting path.

Each measurement runs in a fresh Python process: the pipeline (:func:`dvgate.run.run_pipeline`)
and the report folder (:func:`dvgate.report.write_report`, as ``dvgate run`` writes it) on
the example emulator (``dvgate/examples/bench.toml``) and a scenario. The Python
process's peak resident set is its own ``ru_maxrss`` (:func:`resource.getrusage`) at the
end. The compiled engine's harness runs under ``/usr/bin/time -f %M`` (where present),
which gives the harness's own peak: ``ru_maxrss`` of a child process would count the
Python process's pages at the moment it was forked.

Two paths, both on the compiled engine:

- ``edges``: the engine returns every output edge, and the host side counts them (the
  path every other engine takes);
- ``counts``: the engine counts pulses at the reads and strobes, and a second run keeps
  the edges of the timeline's window only (the default with the compiled engine).

Scenarios: the bundled demo (``dvgate/examples/scenario_demo.toml``) and, with
``--seconds S``, a temporary copy of it stretched to about S seconds (longer bench
dwells and a longer descent; the copy is deleted afterwards).

::

    python benchmarks/run_memory.py                         # the demo, both paths, 3 runs each
    python benchmarks/run_memory.py --seconds 600 --path counts --repeat 1
    python benchmarks/run_memory.py --seconds 600 --path edges --repeat 1   # gigabytes

Builds are cached (``DVGATE_CACHE``); one warm-up run builds the design before timing.
"""

from __future__ import annotations

import argparse
import datetime
import json
import platform
import re
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from machine import describe

EXAMPLES = Path(__file__).resolve().parents[1] / "dvgate" / "examples"
CONFIG = EXAMPLES / "bench.toml"
DEMO = EXAMPLES / "scenario_demo.toml"
PATHS = ("edges", "counts")


def stretched(seconds: float, folder: Path) -> Path:
    """A copy of the demo scenario lasting about ``seconds``: longer dwells and descent.

    Half the added time goes to the six bench positions (steady 1 g on one axis), half to
    the descent under the parachute (near 1 g along the vehicle's axis).
    """
    text = DEMO.read_text()
    dwell = float(re.search(r'^dwell = "([\d.]+) s"', text, re.M).group(1))
    descent = float(re.search(r'^descent = "([\d.]+) s"', text, re.M).group(1))
    positions = len(re.search(r"^positions = \[(.*)\]", text, re.M).group(1).split(","))
    extra = max(0.0, seconds - demo_seconds())
    text = re.sub(r'^dwell = "[\d.]+ s"', f'dwell = "{dwell + extra / 2 / positions:.6g} s"', text, flags=re.M)
    text = re.sub(r'^descent = "[\d.]+ s"', f'descent = "{descent + extra / 2:.6g} s"', text, flags=re.M)
    path = folder / f"scenario_demo_{seconds:g}s.toml"
    path.write_text(text)
    return path


def demo_seconds() -> float:
    from dvgate.config import load_config
    from dvgate.run import load_profile

    profile = load_profile(DEMO, load_config(CONFIG))
    return profile.stop - profile.start


def child(path: str, scenario: str) -> None:
    """One measured run (in its own process); prints one JSON line."""
    from dvgate.config import load_config
    from dvgate.report import summarize, write_report
    from dvgate.run import run_pipeline
    from dvgate.sim import compiled
    from dvgate.sim.compiled import build, run_compiled

    harness_peaks: list[float] = []
    timer = Path("/usr/bin/time")
    if timer.is_file():
        execute = compiled._execute

        def measured(command: list[str], cycles: int, progress: bool) -> None:
            with tempfile.NamedTemporaryFile(suffix=".txt") as out:
                execute([str(timer), "-f", "%M", "-o", out.name, *command], cycles, progress)
                harness_peaks.append(int(Path(out.name).read_text().split()[-1]) / 1024)

        compiled._execute = measured

    config = load_config(CONFIG)
    build(config.hw)  # cached; a fresh build would count in neither figure

    def edges_engine(params, stim, progress=False):
        # Not the compiled engine's own function: the pipeline takes the edge path.
        return run_compiled(params, stim, progress=progress)

    engine = run_compiled if path == "counts" else edges_engine
    began = time.perf_counter()
    outcome = run_pipeline(scenario, config, engine=engine, engine_name=f"compiled ({path} path)")
    with tempfile.TemporaryDirectory() as tmp:
        write_report(outcome, Path(tmp) / "report", summarize(outcome))
    wall = time.perf_counter() - began
    own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    harness = max(harness_peaks, default=float("nan"))
    print(json.dumps({"wall": wall, "simulation": outcome.seconds, "rss_mb": own, "harness_mb": harness,
                      "cycles": outcome.plan.stop, "books": not outcome.books,
                      "pulses": int(outcome.samples.counts[-1].sum()),
                      "timeline_edges": len(outcome.timeline.edges)}))


def measure(path: str, scenario: Path, repeat: int) -> dict:
    runs = []
    for _ in range(repeat):
        done = subprocess.run([sys.executable, __file__, "--child", path, str(scenario)], capture_output=True,
                              text=True)
        if done.returncode != 0:
            raise SystemExit(f"{path} on {scenario.name} failed:\n{done.stderr}")
        runs.append(json.loads(done.stdout.strip().splitlines()[-1]))
    out = dict(runs[-1])
    for key in ("wall", "simulation", "rss_mb", "harness_mb"):
        out[key] = statistics.median(r[key] for r in runs)
    out["runs"] = len(runs)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, action="append",
                        help="also run the demo stretched to this many seconds (repeatable)")
    parser.add_argument("--no-demo", action="store_true", help="skip the bundled demo")
    parser.add_argument("--path", choices=PATHS, action="append", help="only this path (repeatable)")
    parser.add_argument("--repeat", type=int, default=3, help="runs per figure; the median is shown (default 3)")
    parser.add_argument("--child", nargs=2, metavar=("PATH", "SCENARIO"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(*args.child)
        return

    paths = args.path or list(PATHS)
    print(f"date: {datetime.date.today().isoformat()}")
    print(f"machine: {describe()}")
    print(f"uname: {' '.join(platform.uname())}")
    with tempfile.TemporaryDirectory(prefix="dvgate-bench-") as tmp:
        scenarios = [] if args.no_demo else [("demo", DEMO)]
        scenarios += [(f"demo stretched to {s:g} s", stretched(s, Path(tmp))) for s in args.seconds or ()]
        measure(paths[0], scenarios[0][1], 1)  # warm-up: builds and caches
        print("| scenario | cycles | pulses | path | runs | wall s (median) | simulation s | peak RSS MB "
              "(Python) | peak RSS MB (harness) |")
        print("| --- | ---: | ---: | --- | ---: | ---: | ---: | ---: | ---: |")
        for name, scenario in scenarios:
            for path in paths:
                m = measure(path, scenario, args.repeat)
                assert m["books"], f"{name}, {path}: the books do not balance"
                print(f"| {name} | {m['cycles']:,} | {m['pulses']:,} | {path} | {m['runs']} | {m['wall']:.1f} | "
                      f"{m['simulation']:.1f} | {m['rss_mb']:.0f} | {m['harness_mb']:.0f} |", flush=True)


if __name__ == "__main__":
    main()
