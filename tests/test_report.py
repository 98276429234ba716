"""The report: plain-data summary, markdown, plots, and a folder written whole or not at all."""

import json

import numpy as np
import pytest
from motionkit import fast_config

import dvgate.report as report
from dvgate.errors import UserError
from dvgate.report import PLOTS, markdown, summarize, summary_table, write_report
from dvgate.run import run_pipeline
from dvgate.sim.model import run_model

DEMO_LIKE = """\
title = "short flight"
invented = true
[flight]
descent = "2 s"
[flight.bench]
positions = ["+z", "-z"]
dwell = "0.5 s"
transition = "0.3 s"
"""


@pytest.fixture(scope="module")
def outcome(tmp_path_factory):
    path = tmp_path_factory.mktemp("scenario") / "flight.toml"
    path.write_text(DEMO_LIKE)
    cfg = fast_config(sensor={"bias": {"x": "200 ug"}}, host={"cycle": "20 ms", "load_warning": "5 %"})
    return run_pipeline(path, cfg, engine=run_model)


def test_summary_is_plain_data(outcome):
    summary = summarize(outcome)
    text = json.dumps(summary)  # plain JSON, no numpy leftovers
    back = json.loads(text)
    assert back["dvgate_report"] == 1
    assert back["notes"][0].startswith("invented scenario")
    assert back["host"]["cycle_s"] == pytest.approx(0.02)
    assert back["sensor"]["channels"]["x"]["bias_ug"] == pytest.approx(200.0)
    z = back["channels"][2]
    assert z["net"] == z["pos"] - z["neg"]
    assert z["dv_host"] == pytest.approx(z["net"] * 0.01)
    assert abs(z["final_error_pulses"]) < 1.0
    assert z["dv_commanded"] == pytest.approx(outcome.program.velocity(outcome.program.total_ticks)[0, 2])
    # the counting load passes 5 % in this config (one rest pulse per line per strobe):
    assert back["host"]["overloaded"]
    assert any("counting load reached" in w for w in back["warnings"])
    assert [p["name"] for p in back["phases"]][-3:] == ["boost", "coast", "descent"]


def test_markdown_and_terminal(outcome):
    summary = summarize(outcome)
    page = markdown(summary)
    assert page.startswith("# short flight\n")
    assert "*invented scenario" in page
    assert "| x | " in page and "| error end/max |" in page
    for name in PLOTS:
        assert f"]({name})" in page
    assert "## Sensor error model" in page
    from rich.console import Console

    console = Console(record=True, width=140)
    console.print(summary_table(summary))
    shown = console.export_text()
    assert "what the computer read" in shown and "warning:" in shown


def test_write_report_whole(outcome, tmp_path):
    folder = write_report(outcome, tmp_path / "r")
    names = sorted(p.name for p in folder.iterdir())
    assert names == sorted([*PLOTS, "program.npz", "summary.json", "summary.md"])
    for name in PLOTS:
        data = (folder / name).read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10_000
    # An earlier report is replaced; nothing else is left beside it.
    (folder / "stale.txt").write_text("old")
    write_report(outcome, folder)
    assert not (folder / "stale.txt").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r"]


def test_no_partial_report_when_writing_fails(outcome, tmp_path, monkeypatch):
    def broken(outcome, folder):
        (folder / "velocity.png").write_bytes(b"half")
        raise RuntimeError("disk full")

    monkeypatch.setattr(report, "_plots", broken)
    with pytest.raises(RuntimeError, match="disk full"):
        write_report(outcome, tmp_path / "r")
    assert list(tmp_path.iterdir()) == []


def test_refusals(outcome, tmp_path):
    with pytest.raises(UserError, match="does not exist"):
        write_report(outcome, tmp_path / "absent" / "r")
    (tmp_path / "file").write_text("x")
    with pytest.raises(UserError, match="not a dvgate report folder"):
        write_report(outcome, tmp_path / "file")


def test_timeline_shows_the_busiest_strobe(outcome):
    tl = outcome.timeline
    hw = outcome.config.hw
    assert tl.take == tl.strobe + hw.min_width_cyc + 1
    first = min(e.rise for e in tl.edges)
    assert first == tl.strobe + hw.latency_cyc  # docs/timing.md: L = M + 2
    assert tl.start < tl.strobe < tl.take < tl.stop
    z_pulses = sum(1 for e in tl.edges if e.channel == 2 and e.rise >= tl.take)
    per_strobe = np.diff(outcome.samples.at(outcome.plan.takes).counts[:, 2].sum(axis=1))
    assert z_pulses == per_strobe.max()
