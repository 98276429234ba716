"""The pipeline and `dvgate run`: engines, placement, end-to-end runs and every bad input."""

import json
from pathlib import Path

import numpy as np
import pytest
from conftest import need_tool
from motionkit import fast_config

from dvgate.cli import main
from dvgate.errors import UserError
from dvgate.run import default_engine, engine_by_name, load_profile, plan_run, run_pipeline
from dvgate.sim.model import run_model
from dvgate.sim.program import make_program

EXAMPLES = Path(__file__).resolve().parent.parent / "dvgate" / "examples"

FAST_TOML = """\
clock = "1 MHz"
[strobe]
min_width = "3 us"
absence_timeout = "50 ms"
period = "10 ms"
[pulses]
scheme = "burst"
rest = 1
width = "1 us"
gap = "1 us"
[rate]
frac_bits = 36
clamp = 2000
backlog = 4000
[defaults]
weight = "0.01 m/s"
range = "16 g"
[[channels]]
name = "x"
[[channels]]
name = "y"
[[channels]]
name = "z"
"""


@pytest.fixture
def config_file(tmp_path):
    path = tmp_path / "fast.toml"
    path.write_text(FAST_TOML)
    return path


def scenario(tmp_path, text, name="s.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_default_engine_is_compiled_or_the_model():
    engine, why = default_engine()
    # Never Amaranth's cycle-by-cycle simulator: far too slow for billions of cycles.
    assert engine is run_model or why.startswith("compiled")
    assert engine_by_name("model")[0] is run_model
    assert engine_by_name(None)[1] == why
    with pytest.raises(UserError, match="engine = 'quantum'"):
        engine_by_name("quantum")


def test_any_engine_can_run_the_pipeline(tmp_path):
    calls = []

    def engine(params, stim, progress=None):
        calls.append(progress)
        return run_model(params, stim)

    path = scenario(tmp_path, '[static]\nduration = "0.3 s"\n')
    out = run_pipeline(path, fast_config(), engine=engine, engine_name="mine")
    assert calls == [False]  # an engine with its own progress bar is told whether to show it
    assert out.engine == "mine; edge path: every pulse edge held in memory"
    assert out.result.edges == ()  # dropped once counted
    assert not out.books


def _edge_path(params, stim, progress=False):
    """The compiled engine behind a function of its own: the pipeline then takes the edge path."""
    from dvgate.sim.compiled import run_compiled

    return run_compiled(params, stim, progress=progress)


def _same_outcome(a, b):
    """Every result of two runs equal (``==``; arrays element by element, with their shapes)."""
    def same(x, y):
        return x.shape == y.shape and x.dtype == y.dtype and bool(np.all(x == y))

    assert same(a.samples.cycles, b.samples.cycles) and same(a.samples.counts, b.samples.counts)
    for field in ("reads", "times", "counts", "velocity", "delta", "pulses", "pulse_rate", "load"):
        assert same(getattr(a.host, field), getattr(b.host, field)), field
    assert a.host.alarms == b.host.alarms and a.host.timing == b.host.timing
    assert same(a.error, b.error) and same(a.commanded, b.commanded) and same(a.true_velocity, b.true_velocity)
    assert a.books == b.books
    assert a.result == b.result  # status and books at the end; neither keeps edges
    assert a.timeline == b.timeline  # the same strobe, window and edges


@pytest.mark.parametrize(("text", "host"), [
    ('[tumble]\ndwell = "0.3 s"\ntransition = "0.2 s"\n', None),
    ('[burn]\nburn_time = "0.5 s"\nbefore = "0.1 s"\nafter = "0.2 s"\n', {"cycle": "25 ms"}),
])
def test_counting_path_equals_the_edge_path(tmp_path, text, host):
    need_tool("g++")
    from dvgate.sim.compiled import run_compiled

    cfg = fast_config(host=host) if host else fast_config()
    path = scenario(tmp_path, text)
    counted = run_pipeline(path, cfg, engine=run_compiled, engine_name="compiled")
    edges = run_pipeline(path, cfg, engine=_edge_path, engine_name="compiled")
    assert counted.engine.startswith("compiled; counting path") and edges.engine.startswith("compiled; edge path")
    _same_outcome(counted, edges)
    # Not vacuous: pulses were counted, the books were checked, the window has pulses.
    assert counted.samples.counts[-1].sum() > 1000 and counted.plan.stimulus.arm_changes
    assert len(counted.timeline.edges) > 10 and not counted.books
    # ... and the model, the independent reference, agrees with both.
    _same_outcome(run_pipeline(path, cfg, engine=run_model, engine_name="compiled"), edges)


def test_plan_places_the_program(tmp_path):
    cfg = fast_config()
    profile = load_profile(scenario(tmp_path, '[static]\nduration = "0.05 s"\n'), cfg)
    program = make_program(profile, cfg)
    plan = plan_run(program, cfg, read_every=10_000)
    assert plan.origin == 5  # three channels, one commit, one spare
    assert plan.stimulus.arm_changes == ((4, True),)  # armed from the origin on
    assert plan.stimulus.rate_changes[0].cycle == plan.origin
    assert (plan.stop - plan.origin) % 10_000 == 0
    assert plan.stop >= plan.origin + program.total_ticks + cfg.strobe_period_cyc
    assert plan.strobe_edges[0] == plan.origin + cfg.strobe_period_cyc
    # the detector takes a strobe M + 1 cycles after the pin turns active (docs/timing.md)
    assert plan.takes[0] == plan.strobe_edges[0] + cfg.hw.min_width_cyc + 1


def test_host_read_error_stays_within_one_pulse(tmp_path):
    # Reads fall on strobe edges, so each read sees every pulse of the strobes before it:
    # the count differs from the program's integral at the last strobe by less than one
    # pulse (first-order error feedback keeps the running error within one quantum:
    # Schreier and Temes, Understanding Delta-Sigma Data Converters).
    out = run_pipeline(EXAMPLES / "scenario_centrifuge.toml", fast_config(), engine=run_model)
    assert np.abs(out.error).max() < 1.0
    assert out.result.status.clamps == 0 and out.result.status.overruns == 0
    # the commanded velocity at the end is the program's integral
    np.testing.assert_allclose(out.commanded[-1], out.program.velocity(out.program.total_ticks)[0])


def test_sensor_model_shows_in_the_outcome(tmp_path):
    cfg = fast_config(sensor={"bias": {"y": "1 mg"}})
    out = run_pipeline(scenario(tmp_path, '[static]\nduration = "2 s"\n'), cfg, engine=run_model)
    # 1 mg over 2 s: 2 x 9.80665e-3 m/s (standard gravity, 3rd CGPM)
    assert out.commanded[-1, 1] - out.true_velocity[-1, 1] == pytest.approx(2 * 9.80665e-3, abs=1e-9)
    assert out.sensor.model.active


def test_load_profile_by_extension(tmp_path):
    with pytest.raises(UserError, match=r"expected a scenario file \(\.toml\) or a CSV profile \(\.csv\)"):
        load_profile(tmp_path / "profile.txt", fast_config())


def test_cli_writes_the_report(tmp_path, config_file, capsys):
    out_dir = tmp_path / "report"
    path = scenario(tmp_path, '[tumble]\ndwell = "0.3 s"\ntransition = "0.2 s"\n')
    assert main(["run", str(path), str(config_file), "-o", str(out_dir), "--engine", "model"]) == 0
    printed = capsys.readouterr().out
    assert "what the computer read" in printed and "books" in printed
    for name in ("summary.json", "summary.md", "program.npz", "velocity.png", "error.png", "load.png",
                 "timeline.png"):
        assert (out_dir / name).is_file(), name
    summary = json.loads((out_dir / "summary.json").read_text())
    assert summary["books_balance"] and summary["engine"].startswith("reference model")
    assert [c["name"] for c in summary["channels"]] == ["x", "y", "z"]


def test_cli_runs_a_csv(tmp_path, config_file):
    out_dir = tmp_path / "report"
    assert main(["run", str(EXAMPLES / "profile_example.csv"), str(config_file), "-o", str(out_dir),
                 "--engine", "model"]) == 0
    summary = json.loads((out_dir / "summary.json").read_text())
    z = summary["channels"][2]
    # 1 g for 4 s plus the extra half g ramped up, held and down: (1 + 0.5 x 1.5) g s
    assert z["dv_commanded"] == pytest.approx(9.80665 * (4.0 + 0.5 * 1.5), abs=1e-6)
    assert abs(z["dv_host"] - z["dv_commanded"]) < 0.01


CSV_HEAD = "time [s], x [m/s^2], y [m/s^2], z [m/s^2]\n"
BAD = [
    ("p.csv", CSV_HEAD + "0, 0, 0, 0\n1, nan, 0, 0\n", r"p\.csv: line 3, column 'x': 'nan' is not a finite number"),
    ("p.csv", CSV_HEAD + "0, 0, 0, 0\n1, 0, , 0\n", r"p\.csv: line 3, column 'y': empty cell"),
    ("p.csv", CSV_HEAD + "0, 0, 0, 0\n2, 0, 0, 0\n1, 0, 0, 0\n", r"p\.csv: line 4, column 'time': time goes backwards"),
    ("p.csv", "time [s], x [m/s^2], y [m/s^2]\n0, 0, 0\n1, 0, 0\n", r"p\.csv: line 1: missing column\(s\) 'z'"),
    ("p.csv", CSV_HEAD.replace("z [", "zz [") + "0, 0, 0, 0\n1, 0, 0, 0\n",
     r"p\.csv: line 1, column 4: unknown column 'zz'"),
    ("p.csv", CSV_HEAD.replace("y [m/s^2]", "y [deg/s]") + "0, 0, 0, 0\n1, 0, 0, 0\n",
     r"p\.csv: line 1, column 'y': unit 'deg/s' is not an acceleration"),
    ("p.csv", CSV_HEAD + "0, 0, 0, 0\n1, 0, 0, 200\n2, 0, 0, 0\n",
     r"p\.csv: line 3, column 'z' \(t = 1 s\): \+200 m/s\^2 .* beyond the full scale"),
    ("s.toml", '[tumble]\ndwel = "1 s"\n', r"s\.toml: unknown key 'tumble\.dwel'; did you mean 'tumble\.dwell'\?"),
    ("s.toml", 'titel = "x"\n[static]\n', r"s\.toml: unknown key 'titel'; did you mean 'title'\?"),
    ("s.json", "{}", r"expected a scenario file"),
]


@pytest.mark.parametrize(("name", "text", "message"), BAD)
def test_cli_bad_input_exits_2_and_writes_nothing(tmp_path, config_file, capsys, name, text, message):
    import re

    path = scenario(tmp_path, text, name)
    out_dir = tmp_path / "out" / "report"
    out_dir.parent.mkdir()
    assert main(["run", str(path), str(config_file), "-o", str(out_dir)]) == 2
    err = capsys.readouterr().err
    assert re.search(message, err), err
    assert "Traceback" not in err
    assert list(out_dir.parent.iterdir()) == []  # no report, no temporary folder


def test_cli_computation_cycle_shorter_than_strobe_period(tmp_path, capsys):
    config = tmp_path / "fast.toml"
    config.write_text(FAST_TOML.replace('[strobe]', '[host]\ncycle = "2 ms"\n[strobe]'))
    out_dir = tmp_path / "out" / "report"
    out_dir.parent.mkdir()
    path = scenario(tmp_path, '[static]\nduration = "0.1 s"\n')
    assert main(["run", str(path), str(config), "-o", str(out_dir)]) == 2
    err = capsys.readouterr().err
    assert "host.cycle = '2 ms' (2000 cycles): allowed: at least the strobe period" in err
    assert str(config) in err
    assert list(out_dir.parent.iterdir()) == []


def test_cli_refuses_to_overwrite_a_foreign_folder(tmp_path, config_file, capsys):
    busy = tmp_path / "busy"
    busy.mkdir()
    (busy / "notes.txt").write_text("keep me")
    path = scenario(tmp_path, '[static]\nduration = "0.1 s"\n')
    assert main(["run", str(path), str(config_file), "-o", str(busy)]) == 2
    assert "is not a dvgate report folder" in capsys.readouterr().err
    assert (busy / "notes.txt").read_text() == "keep me"


def test_plan_holds_the_stimulus_as_arrays_made_a_chunk_at_a_time(tmp_path, monkeypatch):
    # A long run's strobe edges and rate changes are arrays (Cycles, RateChanges), made a
    # few strobes at a time; they equal the tuples periodic_strobe_edges, strobe_cycles
    # and the program give in one go.
    from dvgate import run as module
    from dvgate.sim.model import strobe_cycles
    from dvgate.sim.stimulus import periodic_strobe_edges
    from dvgate.sim.trace import Cycles, RateChanges

    cfg = fast_config()
    hw = cfg.hw
    profile = load_profile(scenario(tmp_path, '[static]\nduration = "0.5 s"\n'), cfg)
    program = make_program(profile, cfg)
    monkeypatch.setattr(module, "_STROBE_CHUNK", 3)
    plan = plan_run(program, cfg, read_every=7_000)
    stim = plan.stimulus
    assert isinstance(stim.strobe_edges, Cycles) and isinstance(stim.rate_changes, RateChanges)
    edges = periodic_strobe_edges(plan.stop + 1, cfg.strobe_period_cyc, cfg.strobe_width_cyc,
                                  first=plan.origin + cfg.strobe_period_cyc)
    assert len(edges) > 60 and stim.strobe_edges == edges and tuple(stim.strobe_edges) == edges
    assert stim.rate_changes == program.rate_changes(plan.origin, hw.rates)
    takes = [t for t in strobe_cycles(hw, edges, plan.stop) if t >= plan.origin]
    assert plan.takes.tolist() == takes and plan.strobe_edges.tolist() == list(edges[0::2])
