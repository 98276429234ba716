# amaranth: UnusedElaboratable=no
"""Streaming a program to the simulated board (the gateware behind a pseudo-terminal)."""

import subprocess
import sys

import numpy as np
import pytest

from dvgate.cli import main
from dvgate.config import load_config
from dvgate.linkspec import PlayState, Reason, link_params
from dvgate.sim.link_model import ChannelFaults, Segment, asked
from dvgate.sim.program import Program, save_program
from dvgate.sim.simboard import simboard_for
from dvgate.sim.trace import Faults
from dvgate.stream import ChannelCheck, StreamReport, open_port, send_settings, stream

CONFIG = """\
# A small, fast emulator for tests (invented figures).
clock = "1 MHz"
channels = 2
[strobe]
min_width = "2 us"
period = "200 us"
absence_timeout = "5 ms"
[pulses]
width = "2 us"
gap = "2 us"
rest = 1
[link]
baud = 250000
fifo_depth = {depth}
timeout = "1 ms"
underrun = "rest"
"""


@pytest.fixture
def config_path(tmp_path):
    path = tmp_path / "bench.toml"
    path.write_text(CONFIG.format(depth=8))
    return path


def segments_for(config, accel: list[tuple[float, float]], ticks: int) -> list[Segment]:
    """Segments of ``ticks`` cycles at these accelerations (g) per channel."""
    g = 9.80665
    out = [Segment(ticks, tuple(config.rate_to_fixed(ch, a * g) for ch, a in enumerate(pair))) for pair in accel]
    out[-1] = Segment(out[-1].duration, out[-1].rates, True)
    return out


def test_stream_to_the_simulated_board_emits_exactly_the_program(config_path):
    config = load_config(config_path)
    link = link_params(config)
    segments = segments_for(config, [(10, -7), (-3, 12), (5, 0)], 2500)
    board = simboard_for(config).start()
    port = open_port(board.port, 250000)
    try:
        # A fault set in force during the stream, and a window of ignored strobes that
        # ends before it (2000 cycles: 10 strobes at 200 us).
        settings = send_settings(port, link, [ChannelFaults(1, Faults(swap=True))], ignore=2000, reply_timeout=60)
        report = stream(port, link, segments, names=["x", "y"], reply_timeout=60)
    finally:
        port.close()
        state = board.stop()
    assert settings.in_force == {1: Faults(swap=True)} and settings.ignored <= 10
    # The books are the emitter's, before the output faults: exact whatever the swap.
    assert report.ok, report.problems()
    assert report.faults == {"y": Faults(swap=True)} and report.ignored == 0
    frac = link.hw.frac_bits
    for check, want in zip(report.channels, asked(segments, 2), strict=True):
        assert check.asked == want
        # Burst scheme, rates back to zero after the program, strobes since: the whole
        # pulses owed have come out, and the remainder owed is less than one pulse.
        assert check.pend_pos == check.pend_neg == 0
        assert check.net == int(want / (1 << frac)) and abs(check.owed) < (1 << frac)
    assert report.underruns == 0 and report.rejected[Reason.BUSY] == 0
    assert state.play == PlayState.IDLE and state.played == 3 and state.rates == (0, 0)


def test_unplugged_mid_stream_the_board_rests_and_the_streamer_says_so(config_path, capsys, tmp_path):
    config = load_config(config_path)
    accel = [(4, -4), (-2, 6), (3, 1), (1, 1), (2, 2), (-1, -1), (5, 0), (0, 5), (1, -1), (2, -2), (3, 3), (1, 0)]
    program_path = tmp_path / "program.npz"
    segments = segments_for(config, accel, 2000)
    program = Program(np.array([s.duration for s in segments]), np.array([s.rates for s in segments]),
                      ("x", "y"), config.hw.frac_bits, config.clock_hz, (0.01, 0.01), 2000)
    save_program(program, program_path)
    board = simboard_for(config, unplug_after_played=2, linger_cyc=30_000).start()
    status = main(["stream", str(program_path), "--port", board.port, "--config", str(config_path),
                   "--reply-timeout", "60"])
    state = board.join()
    err = capsys.readouterr().err
    assert status == 3
    assert f"the link to {board.port} was lost mid-stream" in err and "underrun policy ('rest'" in err
    assert "Traceback" not in err
    # The board ran out of segments and fell back to rest: zero rates, still armed, counted.
    assert state.unplugged_at is not None
    assert state.play == PlayState.STARVED and state.underruns >= 1
    assert state.rates == (0, 0) and state.armed
    assert 2 <= state.played < len(accel)


def test_cli_streams_to_a_simboard_process(config_path, tmp_path):
    config = load_config(config_path)
    segments = segments_for(config, [(6, -2), (1, 9)], 3000)
    program = Program(np.array([s.duration for s in segments]), np.array([s.rates for s in segments]),
                      ("x", "y"), config.hw.frac_bits, config.clock_hz, (0.01, 0.01), 3000)
    program_path = save_program(program, tmp_path / "program.npz")
    # cwd outside the repository: there, `-m` would find the top folder's dvgate/ without
    # its mapped subpackages instead of the installed package.
    board = subprocess.Popen([sys.executable, "-m", "dvgate.cli", "simboard", str(config_path)],
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=tmp_path)
    try:
        port = board.stdout.readline().strip()
        assert port.startswith("/dev/"), board.stderr.read()
        result = subprocess.run([sys.executable, "-m", "dvgate.cli", "stream", str(program_path), "--port", port,
                                 "--config", str(config_path), "--reply-timeout", "60"],
                                capture_output=True, text=True, timeout=300, cwd=tmp_path)
    finally:
        board.terminate()
        board.wait(timeout=30)
        board.stdout.close()
        board.stderr.close()
    assert result.returncode == 0, result.stderr
    assert "the board emitted exactly what the program asked for" in result.stdout
    assert "exact" in result.stdout and "MISMATCH" not in result.stdout


def test_stream_prints_the_ignored_strobes_and_the_faults_in_force(config_path, tmp_path, capsys, monkeypatch):
    import dvgate.commands.stream as command

    check = ChannelCheck("y", asked=3 << 8, pos=5, neg=2, pend_pos=0, pend_neg=0, owed=0, frac_bits=8)
    report = StreamReport(segments=1, refits=0, channels=[check], strobes=40, ignored=12,
                          faults={"y": Faults(swap=True, storm_period=30)})

    class Port:
        def close(self) -> None:
            pass

    monkeypatch.setattr(command, "load_stream_program", lambda path, config: ([], 0))
    monkeypatch.setattr(command, "open_port", lambda device, baud: Port())
    monkeypatch.setattr(command, "stream", lambda *args, **kwargs: report)
    assert main(["stream", str(tmp_path / "p.npz"), "--port", "/dev/null", "--config", str(config_path)]) == 0
    out = " ".join(capsys.readouterr().out.split())  # rich wraps long lines
    assert "strobes 40 (ignored 12)" in out
    assert "faults in force: channel y: swap, storm every 30 cycles on the pos line" in out


def test_stream_refuses_bad_input(config_path, tmp_path, capsys):
    assert main(["stream", str(tmp_path / "p.csv"), "--port", "/dev/null", "--config", str(config_path)]) == 2
    assert "expected a pulse program (.npz)" in capsys.readouterr().err
    missing = tmp_path / "no-such-port"
    program = Program(np.array([100]), np.array([[1, 2]]), ("x", "y"), 36, 1e6, (0.01, 0.01), 100)
    path = save_program(program, tmp_path / "p.npz")
    assert main(["stream", str(path), "--port", str(missing), "--config", str(config_path)]) == 2
    assert f"--port {missing}: cannot open it" in capsys.readouterr().err


def test_stream_refuses_a_program_for_another_config(config_path, tmp_path, capsys):
    program = Program(np.array([100]), np.array([[1, 2, 3]]), ("x", "y", "z"), 36, 1e6, (0.01,) * 3, 100)
    path = save_program(program, tmp_path / "p.npz")
    assert main(["stream", str(path), "--port", "/dev/null", "--config", str(config_path)]) == 2
    assert "does not fit the config" in capsys.readouterr().err


def test_report_explains_a_mismatch():
    ok = ChannelCheck("x", asked=3 << 8, pos=5, neg=2, pend_pos=0, pend_neg=0, owed=0, frac_bits=8)
    off = ChannelCheck("y", asked=3 << 8, pos=5, neg=1, pend_pos=0, pend_neg=0, owed=0, frac_bits=8)
    report = StreamReport(segments=1, refits=0, channels=[ok, off], underruns=2, policy="hold")
    assert ok.exact and not off.exact and not report.ok
    assert report.problems() == [
        "channel y: the board accounts for +1 pulses more than the program asked",
        "2 underrun(s): the board held the last rates while it waited for segments (feed it faster: a higher "
        "baud rate, or longer segments)",
    ]


def test_stream_needs_a_last_segment(config_path):
    link = link_params(load_config(config_path))
    with pytest.raises(ValueError, match="flagged last"):
        stream(None, link, [Segment(100, (0, 0))], names=["x", "y"])
