# amaranth: UnusedElaboratable=no
"""Fault injection over the host link (docs/link.md, "Faults"): FAULT and IGNORE frames.

The gateware's port writes and outputs are held equal to the link model's stimulus run
through the reference model; corrupted, malformed and repeated frames are counted and
never applied (twice); the host API applies each setting exactly once over a lossy port;
the command line sets faults on the simulated board.
"""

from __future__ import annotations

import dataclasses

import pytest
from amaranth.lib import data
from test_link import assert_link_equal, fed, make_link, reply_payloads
from test_stream import CONFIG

from dvgate.cli import main
from dvgate.config import load_config
from dvgate.errors import UserError
from dvgate.gateware.faults import FaultLayout, pack_faults
from dvgate.linkspec import FAULT_DELAY, FAULT_SET_BITS, FILLER, FrameType, LinkParams, Reason
from dvgate.sim.link_bench import run_linked
from dvgate.sim.link_model import (
    ChannelFaults,
    LinkModel,
    Segment,
    arrivals,
    encode_command,
    encode_fault,
    encode_frame,
    encode_ignore,
    encode_segment,
    encode_telemetry_request,
    fault_payload,
    link_stimulus,
    pack_telemetry,
    parse_fault,
    parse_ignore,
    parse_telemetry,
    reply_values,
    rx_cycle,
    schedule,
)
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.trace import Faults
from dvgate.stream import SettingsReport, describe_faults, parse_fault_setting, parse_ignore_window, send_settings

LINK = make_link()


# -- payloads ------------------------------------------------------------------------------

def test_fault_payload_layout():
    setting = ChannelFaults(1, Faults(silence_neg=True, swap=True, storm_period=0x0102, storm_neg=True))
    # seq 0x1234 little-endian, channel 1, set byte: silence_neg (bit 1), swap (bit 4),
    # storm_neg (bit 6) = 0x52, storm period 0x0102 little-endian (docs/link.md).
    assert fault_payload(0x1234, setting, LINK) == bytes((0x34, 0x12, 0x01, 0x52, 0x02, 0x01))
    assert parse_fault(fault_payload(0x1234, setting, LINK), LINK) == (0x1234, setting)
    assert encode_ignore(7, 0x01020304) == encode_frame(FrameType.IGNORE, bytes((7, 0, 4, 3, 2, 1)))
    assert parse_ignore(bytes((7, 0, 4, 3, 2, 1))) == (7, 0x01020304)


def test_fault_set_byte_covers_every_fault_field():
    layout_fields = {name for name, _ in data.Layout.cast(FaultLayout)}
    trace_fields = {f.name for f in dataclasses.fields(Faults)}
    assert set(FAULT_SET_BITS) | {"storm_period"} == layout_fields == trace_fields


@pytest.mark.parametrize(("payload", "why"), [
    (bytes((0, 0, 2, 0, 0, 0)), "no channel 2"),
    (bytes((0, 0, 0, 0x80, 0, 0)), "unknown bit 7 of the set byte"),
])
def test_malformed_fault_payloads_parse_as_none(payload, why):
    assert parse_fault(payload, LINK) == (0, None), why


def test_settings_checked_before_sending():
    with pytest.raises(ValueError, match="fault channel 2; allowed: 0 to 1"):
        encode_fault(0, ChannelFaults(2, Faults()), LINK)
    with pytest.raises(ValueError, match="ignore window of 0 cycles; allowed: 1 to 4294967295 cycles"):
        encode_ignore(0, 0)


# -- the linked top, end to end ---------------------------------------------------------

SETTINGS = [
    ChannelFaults(0, Faults(storm_period=13)),
    ChannelFaults(1, Faults(swap=True, silence_neg=True)),
    None,  # the ignore window
    ChannelFaults(0, Faults(no_rest=True, stuck_neg=True)),
    ChannelFaults(0, Faults()),
]


def test_fault_frames_through_the_linked_top_equal_the_model():
    link = make_link(timeout_cyc=200)
    segs = [Segment(900, (40, -30)), Segment(900, (-25, 33), last=True)]
    chunks = [(encode_segment(0, segs[0], link), 0), (encode_segment(1, segs[1], link), 0),
              (encode_command(FrameType.START, 2), 0)]
    for k, setting in enumerate(SETTINGS):
        frame = encode_ignore(3 + k, 300) if setting is None else encode_fault(3 + k, setting, link)
        chunks.append((frame, (100, 0, 50, 50, 100)[k]))
    wire = schedule(chunks, link.bit_cyc, first=10)
    cycles = wire[-1].start + 800
    strobes = periodic_strobe_edges(cycles, 61, 3, first=7)
    run = run_linked(link, wire, cycles, strobe_edges=strobes)
    model = LinkModel(link)
    model.feed_all(arrivals(wire, link.bit_cyc))
    model.finish(cycles)
    assert model.rejections == [] and model.counters.next_seq == 8
    expected = run_model(link.hw, model.stimulus(cycles, strobes))
    assert run.edges == expected.edges  # every output pulse, to the cycle
    assert run.status["ignored"] == expected.status.ignored > 0
    # The ports: each setting written once, holding from its frame's end + FAULT_DELAY.
    assert list(run.faults) == [(c.cycle, c.channel, pack_faults(c.faults)) for c in model.fault_changes]
    assert list(run.ignores) == model.ignore_windows == [(model.ignore_windows[0][0], 300)]
    assert [c.faults for c in model.fault_changes] == [s.faults for s in SETTINGS if s is not None]
    # By hand (docs/link.md): the frame ends the cycle after its last byte is offered, at
    # rx_cycle(start bit) + 1, and its setting holds FAULT_DELAY = 2 cycles later.
    last_byte = sum(len(frame) for frame, _ in chunks[:4]) - 1
    assert run.faults[0][0] == rx_cycle(wire[last_byte].start, link.bit_cyc) + 1 + 2 == \
        rx_cycle(wire[last_byte].start, link.bit_cyc) + 1 + FAULT_DELAY
    # The settings changed the outputs; playback went on untouched.
    plain = run_model(link.hw, link_stimulus(model.player, cycles, strobes))
    assert plain.edges != expected.edges
    assert run.status["played"] == 2 and run.status["underruns"] == 0


def test_telemetry_reads_back_the_ignored_strobes_and_the_fault_sets_in_force():
    link = make_link(timeout_cyc=200)
    burst = Faults(no_rest=True, storm_period=13, storm_neg=True)
    swapped = Faults(swap=True, stuck_pos=True)
    chunks = [(encode_segment(0, Segment(900, (40, -30), last=True), link), 0),
              (encode_command(FrameType.START, 1), 0),
              (encode_fault(2, ChannelFaults(0, burst), link), 0),
              (encode_fault(3, ChannelFaults(1, swapped), link), 0),
              (encode_ignore(4, 300), 0),
              (encode_telemetry_request(0), 400),  # after the window, whose strobes were ignored
              (encode_telemetry_request(1), link.reply_busy_cyc)]
    wire = schedule(chunks, link.bit_cyc, first=10)
    cycles = wire[-1].start + link.reply_busy_cyc + 100
    strobes = periodic_strobe_edges(cycles, 61, 3, first=7)
    run = run_linked(link, wire, cycles, strobe_edges=strobes)
    model = LinkModel(link)
    model.feed_all(arrivals(wire, link.bit_cyc))
    model.finish(cycles)
    assert model.rejections == [] and len(model.replies) == 2
    assert run.edges == run_model(link.hw, model.stimulus(cycles, strobes)).edges  # the faults act
    payloads = reply_payloads(link, run.tx)
    # Every byte of each reply: the link model's fields (the fault set in force among
    # them) with the reference model's status, books and pulse counts (the emitter's,
    # before the output faults) at the request's cycle.
    for payload, (cycle, fields) in zip(payloads, model.replies, strict=True):
        at = run_model(link.hw, model.telemetry_stimulus(cycle, strobes))
        assert payload == pack_telemetry(reply_values(fields, at), link)
    first, second = (parse_telemetry(payload, link) for payload in payloads)
    # A 300-cycle window over a strobe every 61 cycles holds 4 or 5 of them (by hand).
    assert first.ignored == second.ignored == run.status["ignored"] in (4, 5)
    assert (first.channel, first.faults, second.channel, second.faults) == (0, burst, 1, swapped)
    # The FAULT frame's encoding (docs/link.md): no_rest bit 5, storm_neg bit 6; swap
    # bit 4, stuck_pos bit 2.
    assert (first.fault_set, first.storm_period, second.fault_set, second.storm_period) == (0x60, 13, 0x14, 0)


# -- command layer: corrupted, malformed, repeated ----------------------------------------

def test_corrupted_malformed_and_repeated_fault_frames():
    good = encode_fault(0, ChannelFaults(1, Faults(stuck_pos=True)), LINK)
    flipped = bytearray(good)
    flipped[5] ^= 0x04
    frames = [
        bytes(flipped),                                                  # CRC
        good[:6],                                                        # TRUNCATED by the next flag
        encode_frame(FrameType.FAULT, bytes((0, 0, 2, 0, 0, 0))),        # FORMAT: no channel 2
        encode_frame(FrameType.FAULT, bytes((0, 0, 0, 0x80, 0, 0))),     # FORMAT: unknown set bit
        encode_frame(FrameType.IGNORE, bytes((0, 0, 0, 0, 0, 0))),       # FORMAT: empty window
        encode_frame(FrameType.IGNORE, bytes((0, 0, 1, 0, 0))),          # FORMAT: wrong length
        good,                                                            # applied
        good,                                                            # SEQUENCE: a repeat
        encode_ignore(1, 40),                                            # applied
        encode_ignore(1, 40),                                            # SEQUENCE: a repeat
        encode_fault(5, ChannelFaults(0, Faults(swap=True)), LINK),      # SEQUENCE: 2 expected
        encode_telemetry_request(1),                                     # applied
        encode_telemetry_request(0),                                     # BUSY
    ]
    run, model = assert_link_equal(LINK, fed(frames), 1600)
    assert [r.reason for r in model.rejections] == [Reason.CRC, Reason.TRUNCATED] + [Reason.FORMAT] * 4 + \
        [Reason.SEQUENCE] * 3 + [Reason.BUSY]
    assert model.counters.rejected[Reason.FORMAT] == 4 and model.counters.next_seq == 2
    # The gateware wrote the good setting once and the window once, nothing else.
    assert [(ch, bits) for _, ch, bits in run.faults] == [(1, pack_faults(Faults(stuck_pos=True)))]
    assert [length for _, length in run.ignores] == [40]
    # The reply (equal to the model's, above) reads back channel 1's set: stuck_pos, bit 2.
    assert [(fields["channel"], fields["fault_set"]) for _, fields in model.replies] == [(1, 0b100)]


# -- the host API ------------------------------------------------------------------------------

class ModelBoard:
    """A port whose board is the link model: bytes in at the line's rate, telemetry replies out.

    ``mangle(write_index, data)`` may change or drop what each write puts on the line.
    """

    def __init__(self, link: LinkParams, mangle=None) -> None:
        self.link = link
        self.model = LinkModel(link)
        self.mangle = mangle
        self.t = 10
        self.writes = 0
        self.out = bytearray()
        self._replied = 0

    def write(self, data: bytes) -> int:
        self.writes += 1
        line = self.mangle(self.writes, data) if self.mangle else data
        for byte in line:
            self.model.feed(byte, self.t)
            self.t += self.link.byte_cyc
        self.t += 5
        for _, fields in self.model.replies[self._replied:]:
            frame = encode_frame(FrameType.TELEMETRY_REPLY, pack_telemetry(fields, self.link))
            self.out += frame + bytes((FILLER,)) * (self.link.reply_bytes - len(frame))
            self.t += self.link.reply_busy_cyc
        self._replied = len(self.model.replies)
        return len(data)

    def read(self, size: int = 1) -> bytes:
        data = bytes(self.out[:size])
        del self.out[:size]
        return data


WANT = [ChannelFaults(0, Faults(storm_period=9, storm_neg=True)), ChannelFaults(1, Faults(silence_pos=True))]


def test_send_settings_applies_each_once_over_a_lossy_line():
    lost = []

    def lose_first_fault(index: int, data: bytes) -> bytes:
        if data[1] == FrameType.FAULT and not lost:
            lost.append(index)
            return b""
        return data

    board = ModelBoard(LINK, lose_first_fault)
    report = send_settings(board, LINK, WANT, ignore=250, reply_timeout=0.5)
    model = board.model
    assert lost and report.resent == 3  # sent again from the lost one: both faults and the window
    assert [ChannelFaults(c.channel, c.faults) for c in model.fault_changes] == WANT
    assert [length for _, length in model.ignore_windows] == [250]
    assert report.telemetry.next_seq == 3 and report.first_seq == 0
    # The two after the lost one arrived out of turn the first time: refused, counted.
    assert model.counters.rejected[Reason.SEQUENCE] == 2
    # Read back from the board's telemetry: each channel's set in force is the one sent.
    assert report.in_force == {0: WANT[0].faults, 1: WANT[1].faults} and report.mismatched == []
    assert report.telemetry.channel == 1  # the last channel set: no extra read for it


def test_settings_report_names_a_channel_read_back_otherwise():
    telemetry = parse_telemetry(pack_telemetry({"ignored": 7}, LINK), LINK)
    report = SettingsReport(tuple(WANT), None, 0, 0, telemetry, {0: WANT[0].faults, 1: Faults()})
    assert report.mismatched == [1] and report.ignored == 7


def test_send_settings_with_every_frame_doubled_applies_once():
    board = ModelBoard(LINK, lambda index, data: data + data if data[1] != FrameType.TELEMETRY else data)
    report = send_settings(board, LINK, WANT, reply_timeout=0.5)
    model = board.model
    assert report.resent == 0
    assert [ChannelFaults(c.channel, c.faults) for c in model.fault_changes] == WANT
    assert model.counters.rejected[Reason.SEQUENCE] == 2  # each repeat refused


# -- reading settings as a user writes them ---------------------------------------------------

@pytest.fixture
def config(tmp_path):
    path = tmp_path / "bench.toml"
    path.write_text(CONFIG.format(depth=8))
    return load_config(path)


def test_parse_fault_setting(config):
    # 1 MHz: 50 us is 50 cycles (the pulse width is 2 cycles).
    setting = parse_fault_setting(config, "y", ["storm=50 us", "storm-neg", "no_rest"])
    assert setting == ChannelFaults(1, Faults(storm_period=50, storm_neg=True, no_rest=True))
    assert parse_fault_setting(config, "0", []) == parse_fault_setting(config, "x", ["none"]) == \
        ChannelFaults(0, Faults())
    assert parse_fault_setting(config, "x", ["storm=80 cycles"]).faults.storm_period == 80
    assert describe_faults(setting.faults) == "no_rest, storm every 50 cycles on the neg line"
    assert parse_ignore_window(config, "2 ms") == 2000


@pytest.mark.parametrize(("channel", "words", "message"), [
    ("z", [], "CHANNEL = 'z': allowed: a channel name (x, y) or an index 0 to 1"),
    ("x", ["mute"], "fault setting 'mute': allowed: silence_pos, silence_neg"),
    ("x", ["storm=2 us"], "storm = '2 us' (2 cycles): allowed: more than the pulse width (2 cycles"),
    ("x", ["storm=70 ms"], "storm = '70 ms' (70000 cycles): allowed: at most 65535 cycles"),
    ("x", ["storm=5 kg"], "storm = '5 kg': unknown unit 'kg'; allowed: s, ms, us, ns, cycles"),
    ("x", ["storm_neg"], "give storm=PERIOD too"),
    ("x", ["none", "swap"], "'none' clears every fault and stands alone"),
])
def test_parse_fault_setting_errors_name_the_field(config, channel, words, message):
    with pytest.raises(UserError) as info:
        parse_fault_setting(config, channel, words)
    assert message in str(info.value)


def test_cli_bad_input_exits_2_before_opening_the_port(tmp_path, capsys):
    path = tmp_path / "bench.toml"
    path.write_text(CONFIG.format(depth=8))
    missing = tmp_path / "no-such-port"
    assert main(["fault", "x", "swapp", "--port", str(missing), "--config", str(path)]) == 2
    assert main(["fault", "--ignore-strobes", "0 cycles", "--port", str(missing), "--config", str(path)]) == 2
    assert main(["fault", "--port", str(missing), "--config", str(path)]) == 2
    err = capsys.readouterr().err
    assert "fault setting 'swapp'" in err and "--ignore-strobes = '0 cycles'" in err
    assert "give a CHANNEL" in err and "Traceback" not in err and "cannot open" not in err


def test_cli_sets_faults_on_the_simulated_board(tmp_path, capsys):
    from dvgate.sim.simboard import simboard_for

    path = tmp_path / "bench.toml"
    path.write_text(CONFIG.format(depth=8))
    board = simboard_for(load_config(path)).start()
    try:
        status = main(["fault", "y", "swap", "storm=20 us", "--ignore-strobes", "1 ms", "--port", board.port,
                       "--config", str(path), "--reply-timeout", "60"])
    finally:
        state = board.stop()
    out = capsys.readouterr().out
    assert status == 0
    assert "channel y: swap, storm every 20 cycles on the pos line (frame 0, applied once)" in out
    assert "strobes ignored for 1000 cycles (0.001 s) (frame 1, applied once)" in out
    assert "read back: channel y: swap, storm every 20 cycles on the pos line" in out
    assert "strobe(s) ignored since reset" in out and "problem" not in out
    assert state.next_seq == 2


def test_cli_exits_1_when_a_set_reads_back_otherwise(tmp_path, capsys, monkeypatch):
    # Every frame applied, but the board reports another set in force (another host
    # wrote the channel between): the command says so and exits 1, for scripts.
    import types

    import dvgate.commands.fault as fault_command

    path = tmp_path / "bench.toml"
    path.write_text(CONFIG.format(depth=8))
    config = load_config(path)
    sent = parse_fault_setting(config, "y", ["swap"])
    telemetry = types.SimpleNamespace(ignored=0)
    report = SettingsReport((sent,), None, 7, 0, telemetry, {sent.channel: Faults(stuck_pos=True)})
    assert report.mismatched == [sent.channel]

    class Port:
        def close(self) -> None:
            pass

    monkeypatch.setattr(fault_command, "open_port", lambda *args: Port())
    monkeypatch.setattr(fault_command, "send_settings", lambda *args, **kwargs: report)
    status = main(["fault", "y", "swap", "--port", "unused", "--config", str(path)])
    out = capsys.readouterr().out
    assert status == fault_command.EXIT_READ_BACK == 1
    assert "read back: channel y: stuck_pos" in out
    assert "problem: channel y's fault set read back is not the one sent" in out
