# amaranth: UnusedElaboratable=no
"""The host link: CRC, frames, the decoder and encoder, the command layer, the linked top.

The gateware is held equal to the pure-Python model (``dvgate.sim.link_model``), and the
linked top's outputs equal the emulator's reference model driven by the link model.
"""

import binascii

import pytest
from amaranth.sim import Simulator
from conftest import small_params
from hypothesis import given, settings
from hypothesis import strategies as st

from dvgate.config import parse_config
from dvgate.errors import UserError
from dvgate.gateware.faults import pack_faults
from dvgate.gateware.frame_rx import FrameDecoder as FrameDecoderHw
from dvgate.gateware.frame_tx import FrameEncoder
from dvgate.gateware.linked_top import write_linked_verilog
from dvgate.linkspec import ESC, FILLER, FLAG, FrameType, LinkParams, PlayState, Reason, board_lengths, link_params
from dvgate.sim.link_bench import run_link_bytes, run_linked
from dvgate.sim.link_model import (
    ChannelFaults,
    Frame,
    FrameDecoder,
    LinkModel,
    Segment,
    arrivals,
    crc16,
    encode_command,
    encode_frame,
    encode_segment,
    encode_telemetry_request,
    fault_payload,
    host_lengths,
    link_stimulus,
    pack_telemetry,
    parse_telemetry,
    reply_values,
    schedule,
    segment_payload,
)
from dvgate.sim.model import run_model
from dvgate.sim.stimulus import periodic_strobe_edges
from dvgate.sim.trace import Faults

HW = small_params(names=("x", "y"), init_rates=(64, 10))


def make_link(**changes) -> LinkParams:
    base = dict(hw=HW, bit_cyc=4, timeout_cyc=90, fifo_depth=4, underrun="rest")
    base.update(changes)
    return LinkParams(**base)


LINK = make_link()


# -- CRC -------------------------------------------------------------------------------

def test_crc_check_value_in_python():
    # The CRC catalogue's check value for CRC-16/CCITT-FALSE over ASCII "123456789".
    assert crc16(b"123456789") == 0x29B1
    # Cross-checked with Python's binascii.crc_hqx (the same polynomial, initial 0xFFFF).
    assert binascii.crc_hqx(b"123456789", 0xFFFF) == 0x29B1


def test_crc_check_value_in_gateware():
    """The CRC generator the decoder and encoder instantiate, on "123456789"."""
    from amaranth.lib import crc

    dut = crc.catalog.CRC16_CCITT_FALSE(data_width=8).create()
    result = {}

    async def bench(ctx):
        ctx.set(dut.start, 1)
        await ctx.tick()
        ctx.set(dut.start, 0)
        for byte in b"123456789":
            ctx.set(dut.data, byte)
            ctx.set(dut.valid, 1)
            await ctx.tick()
        ctx.set(dut.valid, 0)
        result["crc"] = ctx.get(dut.crc)

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    assert result["crc"] == 0x29B1  # the CRC catalogue's check value


@given(st.binary(max_size=300))
def test_crc_matches_binascii(data):
    assert crc16(data) == binascii.crc_hqx(data, 0xFFFF)  # Python's binascii as the reference


# -- frames in Python --------------------------------------------------------------------

@given(st.integers(1, 255), st.binary(min_size=1, max_size=255))
def test_frame_round_trip_and_no_flag_inside(ftype, payload):
    frame = encode_frame(ftype, payload)
    assert frame[0] == FLAG and FLAG not in frame[1:]
    decoder = FrameDecoder({ftype: len(payload)})
    out = [e for b in frame for e in decoder.feed(b)]
    assert out == [Frame(ftype, payload, 0, len(frame) - 1)]


def test_stuffing_example():
    frame = encode_frame(0x05, bytes((FLAG, 0x01, ESC)))
    body = bytes((0x05, 3, FLAG, 0x01, ESC))
    crc = binascii.crc_hqx(body, 0xFFFF)
    assert frame == bytes((FLAG, 0x05, 0x03, ESC, 0x5E, 0x01, ESC, 0x5D, crc >> 8, crc & 0xFF))


def test_segment_payload_layout():
    payload = segment_payload(0x1234, Segment(1000, (-2, 300), last=True), LINK)
    assert payload == bytes((0x34, 0x12, 0x01, 0xE8, 0x03, 0, 0, 0xFE, 0xFF, 0x2C, 0x01))


@pytest.mark.parametrize(("segment", "match"), [
    (Segment(7, (0, 0)), "duration 7 cycles; allowed: 8 to"),
    (Segment(100, (2048, 0)), "rate 2048 of channel 'x' does not fit the 12-bit rate register"),
    (Segment(100, (0,)), "1 rates for 2 channels"),
])
def test_segment_checked_before_sending(segment, match):
    with pytest.raises(ValueError, match=match):
        encode_segment(0, segment, LINK)


def test_telemetry_pack_parse_round_trip():
    values = {f.name: (i * 37) % 200 for i, f in enumerate(LINK.telemetry_fields)}
    values["owed"] = -1234
    values["state"] = 0b11001
    tm = parse_telemetry(pack_telemetry(values, LINK), LINK)
    assert tm.values == values
    assert tm.play == PlayState.PLAYING and not tm.armed and tm.arm_pin and tm.host_absent


def test_telemetry_layout_as_documented():
    # docs/link.md, "Telemetry": the offsets of the table, O the owed amount's bytes.
    offsets, at = {}, 0
    for f in LINK.telemetry_fields:
        offsets[f.name] = at
        at += f.size
    o = LINK.owed_bytes
    assert (offsets["rej_busy"], offsets["ignored"], offsets["channel"], offsets["pos"], offsets["pend_neg"]) == \
        (48, 50, 52, 53, 63)
    assert (offsets["fault_set"], offsets["storm_period"], offsets["owed"], at) == (65, 66, 68, 68 + o)
    assert LINK.payload_len(FrameType.TELEMETRY_REPLY) == 68 + o


def test_telemetry_fault_set_reads_as_the_fault_frame_writes_it():
    faults = Faults(silence_neg=True, no_rest=True, storm_period=0x0203, storm_neg=True)
    payload = fault_payload(0, ChannelFaults(1, faults), LINK)
    tm = parse_telemetry(pack_telemetry({"fault_set": payload[3], "storm_period": 0x0203}, LINK), LINK)
    assert tm.fault_set == 0b1100010 and tm.faults == faults  # bits 1, 5, 6 (docs/link.md, FAULT)
    assert tm.storm_period == 0x0203 and parse_telemetry(pack_telemetry({}, LINK), LINK).faults == Faults()


# -- config --------------------------------------------------------------------------------

def config(link: dict | None = None, clock: str = "1 MHz"):
    raw = {"clock": clock, "channels": 2, "strobe": {"period": "200 us"},
           "pulses": {"width": "2 us", "gap": "2 us"}}
    if link is not None:
        raw["link"] = link
    return parse_config(raw, "bench.toml")


def test_link_settings_defaults():
    link = link_params(config(clock="12 MHz"))
    assert (link.bit_cyc, link.fifo_depth, link.underrun) == (104, 64, "rest")  # 12 MHz / 115200
    assert link.timeout_cyc == 120_000  # 10 ms


@pytest.mark.parametrize(("section", "message"), [
    ({"baud": 500_000}, "bench.toml: link.baud = 500000: allowed: at most 250000 at this clock"),
    ({"baud": 115200}, "link.baud = 115200: allowed: a rate the clock divides to within 2%"),
    ({"baud": 100_000, "timeout": "10 us"}, "link.timeout = '10 us': allowed: at least 200 cycle(s)"),
    ({"underrun": "stop"}, "link.underrun = 'stop': Input should be 'hold' or 'rest'"),
    ({"fifo_depht": 8}, "unknown key 'link.fifo_depht'; did you mean 'link.fifo_depth'?"),
    ({"fifo_depth": 1}, "link.fifo_depth = 1: Input should be greater than or equal to 2"),
])
def test_link_settings_errors_name_the_field(section, message):
    with pytest.raises(UserError) as info:
        link_params(config(section))
    assert message in str(info.value)


def test_link_params_checked():
    with pytest.raises(ValueError, match="bit_cyc must be at least 4, not 3"):
        make_link(bit_cyc=3)
    with pytest.raises(ValueError, match="timeout_cyc must be at least two byte times"):
        make_link(timeout_cyc=50)


# -- encoder and decoder gateware -----------------------------------------------------------

def run_encoder(ftype: int, payload: bytes, pad_to: int | None = None, fixed: bool = False) -> bytes:
    max_len = 255 if pad_to is None else len(payload)
    dut = FrameEncoder(max_len, pad_to, frame=(ftype, len(payload)) if fixed else None)
    out = bytearray()

    async def bench(ctx):
        if not fixed:  # a fixed frame ignores them
            ctx.set(dut.type, ftype)
            ctx.set(dut.length, len(payload))
        ctx.set(dut.start, 1)
        ctx.set(dut.o.ready, 1)
        await ctx.tick()
        ctx.set(dut.start, 0)
        for cycle in range(3 * (pad_to or 2 * len(payload)) + 30):
            idx = ctx.get(dut.idx)
            ctx.set(dut.data, payload[idx] if idx < len(payload) else 0)
            # Stall every third cycle: the encoder must hold its byte until taken.
            ready = cycle % 3 != 2
            ctx.set(dut.o.ready, ready)
            if ctx.get(dut.o.valid) and ready:
                out.append(ctx.get(dut.o.payload))
            await ctx.tick()
        assert not ctx.get(dut.busy)

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return bytes(out)


@settings(max_examples=15, deadline=None)
@given(st.integers(0, 255), st.lists(st.sampled_from([0x00, 0x7E, 0x7D, 0x5E, 0x5D, 0xFF, 0x20]) | st.integers(0, 255),
                                     min_size=1, max_size=40))
def test_encoder_gateware_sends_what_python_encodes(ftype, payload):
    payload = bytes(payload)
    assert run_encoder(ftype, payload) == encode_frame(ftype, payload)


@pytest.mark.parametrize("payload", [bytes(range(1, 9)), bytes((FLAG, ESC, 0x20, FLAG))])
def test_encoder_with_a_fixed_frame_sends_the_same(payload):
    assert run_encoder(0x85, payload, fixed=True) == encode_frame(0x85, payload)
    assert run_encoder(0x85, payload, pad_to=1 + 2 * (len(payload) + 4), fixed=True)[:len(payload) + 5] == (
        encode_frame(0x85, payload)[:len(payload) + 5])
    with pytest.raises(ValueError, match=r"frame must be a type byte and a length of 1 to 8, not \(133, 9\)"):
        FrameEncoder(8, frame=(0x85, 9))


def test_encoder_pads_every_frame_to_the_same_length():
    plain, special = bytes(range(1, 9)), bytes((FLAG,) * 8)
    pad = 1 + 2 * (8 + 4)
    for payload in (plain, special):
        sent = run_encoder(0x85, payload, pad_to=pad)
        frame = encode_frame(0x85, payload)
        assert len(sent) == pad and sent[:len(frame)] == frame
        assert set(sent[len(frame):]) <= {FILLER}
    with pytest.raises(ValueError, match="pad_to must be at least 25 bytes, not 24"):
        FrameEncoder(8, 24)


def run_decoder(lengths: dict[int, int], timeout: int, feed: list[tuple[int, int, int]], cycles: int):
    """Feed ``(cycle, byte, framing_error)``; return payload bytes and frame ends by cycle."""
    dut = FrameDecoderHw(lengths, timeout)
    got_bytes, ends = [], []

    async def bench(ctx):
        queue = {c: (b, e) for c, b, e in feed}
        for cycle in range(cycles):
            if cycle in queue:
                b, e = queue[cycle]
                ctx.set(dut.i.valid, 1)
                ctx.set(dut.i.payload.data, b)
                ctx.set(dut.i.payload.framing_error, e)
            else:
                ctx.set(dut.i.valid, 0)
            if ctx.get(dut.byte_stb):
                got_bytes.append((cycle, ctx.get(dut.byte_idx), ctx.get(dut.byte)))
            if ctx.get(dut.end_stb):
                ok = ctx.get(dut.end_ok)
                ends.append((cycle, bool(ok), None if ok else Reason(ctx.get(dut.end_reason))))
            await ctx.tick()

    sim = Simulator(dut)
    sim.add_clock(1e-6)
    sim.add_testbench(bench)
    sim.run()
    return got_bytes, ends


def model_ends(lengths, timeout, feed, cycles):
    decoder = FrameDecoder(lengths, timeout)
    out = []
    for cycle, byte, error in feed:
        out += decoder.feed(byte, cycle, bool(error))
    out += decoder.expire(cycles)
    return [(e.cycle, isinstance(e, Frame), None if isinstance(e, Frame) else e.reason)
            for e in out if e.cycle < cycles]


GOOD = encode_frame(0x05, b"\x01")
SEG = encode_frame(0x01, bytes(range(11)))
DECODER_CASES = {
    "good": [GOOD],
    "crc": [GOOD[:3] + bytes((GOOD[3] ^ 2,)) + GOOD[4:]],
    "flag_inside": [SEG[:6], GOOD],
    "esc_esc": [bytes((FLAG, 0x05, ESC, ESC, 0x01, 0x00, 0x00)), GOOD],
    "bad_escape": [bytes((FLAG, 0x05, ESC, 0x11)), GOOD],
    "unknown_type": [encode_frame(0x33, b"\x01"), GOOD],
    "bad_length": [encode_frame(0x05, b"\x01\x02"), GOOD],
    "noise": [b"\x00\x11\x22", GOOD, b"\x7d\x7d"],
    "escaped_payload": [encode_frame(0x05, bytes((FLAG,))), encode_frame(0x01, bytes((ESC,) * 11))],
}


@pytest.mark.parametrize("case", sorted(DECODER_CASES))
def test_decoder_gateware_equals_model(case):
    lengths = {0x05: 1, 0x01: 11}
    data = b"".join(DECODER_CASES[case])
    feed = [(5 + 3 * k, b, 0) for k, b in enumerate(data)]
    cycles = feed[-1][0] + 10
    got_bytes, ends = run_decoder(lengths, 40, feed, cycles)
    assert ends == model_ends(lengths, 40, feed, cycles)
    assert ends, "every case ends at least one frame"
    if case == "good":
        assert ends[0][1] and [b for _, _, b in got_bytes] == [0x01]


def test_decoder_timeout_and_framing_error_equal_model():
    lengths = {0x05: 1}
    # A frame cut by a pause longer than the timeout, then noise, then a byte with a bad
    # stop bit inside a frame and one outside, then a good frame.
    feed = [(5, FLAG, 0), (8, 0x05, 0), (60, 0x01, 0), (63, 0x02, 0),
            (120, FLAG, 0), (123, 0x05, 1), (126, 0x44, 0), (200, 0x10, 1)]
    feed += [(240 + 3 * k, b, 0) for k, b in enumerate(GOOD)]
    cycles = 300
    _, ends = run_decoder(lengths, 40, feed, cycles)
    assert ends == model_ends(lengths, 40, feed, cycles)
    assert [r for _, _, r in ends] == [Reason.TRUNCATED, Reason.NOISE, Reason.LINE, Reason.NOISE, None]
    assert ends[0][0] == 8 + 40 + 1  # the last byte's cycle + timeout + 1 (docs/link.md)


# -- command layer ----------------------------------------------------------------------------

def fed(frames: list[bytes], spacing: int = 3, gap: int = 6, first: int = 4) -> list[tuple[int, int, int]]:
    out, t = [], first
    for frame in frames:
        for byte in frame:
            out.append((t, byte, 0))
            t += spacing
        t += gap
    return out


def model_of(link: LinkParams, feed, cycles) -> LinkModel:
    model = LinkModel(link)
    for cycle, byte, error in feed:
        model.feed(byte, cycle, bool(error))
    model.finish(cycles)
    return model


def assert_link_equal(link: LinkParams, feed, cycles):
    run = run_link_bytes(link, feed, cycles)
    model = model_of(link, feed, cycles)
    assert list(run.rejections) == [(r.cycle, r.reason) for r in model.rejections]
    assert list(run.applied) == [a.cycle for a in model.applied]
    commits, live = [], list(link.hw.rates)
    for cycle, rates in model.player.commits:
        if list(rates) != live and cycle + 1 < cycles:
            commits.append((cycle + 1, rates))
            live = list(rates)
    assert list(run.rates[1:]) == commits
    assert list(run.arm[1:]) == [(c, int(v)) for c, v in model.player.arm_changes if c < cycles]
    # The fault and ignore ports: every write, its cycle and its value.
    assert list(run.faults) == [(c.cycle, c.channel, pack_faults(c.faults)) for c in model.fault_changes]
    assert list(run.ignores) == model.ignore_windows
    status = run.status
    assert status["next_seq"] == model.counters.next_seq
    assert status["rejected"] == model.counters.rejected
    assert status["underruns"] == model.player.underruns
    assert status["played"] == model.player.played
    assert_replies(link, run.replies, model)
    return run, model


def assert_replies(link: LinkParams, replies, model: LinkModel) -> None:
    """Each reply (``LinkBytesRun.replies``): a good frame, padded with filler to the fixed
    reply length, holding the link model's fields of its request: counters, player, the
    channel and its fault set in force (``run_link_bytes`` has the fault stages behind it)."""
    assert len(replies) == len(model.replies)
    frames = []
    for reply in replies:
        decoder = FrameDecoder(host_lengths(link))
        events = [e for b in reply for e in decoder.feed(b)]
        assert isinstance(events[0], Frame) and len(reply) == link.reply_bytes
        assert set(reply[events[0].last + 1:]) <= {FILLER}
        frames.append(events[0])
    for frame, (_, fields) in zip(frames, model.replies, strict=True):
        tm = parse_telemetry(frame.payload, link)
        assert (int(tm.play), tm.armed) == (fields["play"], bool(fields["armed"]))
        assert {name: tm.values[name] for name in fields if name not in ("play", "armed")} == \
            {name: value for name, value in fields.items() if name not in ("play", "armed")}
        assert {"next_seq", "accepted", "rej_busy", "level", "channel", "fault_set", "storm_period"} <= set(fields)


def bad_segment_frame(seq: int, *, flags: int = 0, duration: int = 100, rate_bytes: bytes = b"\x00\x00") -> bytes:
    payload = seq.to_bytes(2, "little") + bytes((flags,)) + duration.to_bytes(4, "little") + rate_bytes + b"\x00\x00"
    return encode_frame(FrameType.SEGMENT, payload)


def test_command_layer_rejects_bad_fields_and_sequence_and_counts_them():
    seg = Segment(40, (100, -100))
    frames = [
        bad_segment_frame(0, flags=0x02),                    # FORMAT: unknown flag
        bad_segment_frame(0, duration=LINK.min_duration - 1),  # FORMAT: too short
        bad_segment_frame(0, rate_bytes=b"\x00\x08"),        # FORMAT: 2048 does not fit 12 bits
        bad_segment_frame(0, rate_bytes=b"\xff\xf7"),        # FORMAT: -2049 does not fit either
        encode_telemetry_request(2),                         # FORMAT: no channel 2
        encode_segment(1, seg, LINK),                        # SEQUENCE: 0 expected
        encode_segment(0, seg, LINK),                        # applied
        encode_segment(0, seg, LINK),                        # SEQUENCE: a repeat
        encode_command(FrameType.START, 1),                  # applied
        encode_command(FrameType.START, 1),                  # SEQUENCE: a repeat
        encode_telemetry_request(1),                         # applied
    ]
    run, model = assert_link_equal(LINK, fed(frames), 900)
    assert [r.reason for r in model.rejections] == [Reason.FORMAT] * 5 + [Reason.SEQUENCE] * 3
    assert model.counters.next_seq == 2 and model.player.played == 1
    assert model.segments_applied() == [seg]


def test_fifo_full_and_busy_are_rejected_and_retried():
    link = make_link(fifo_depth=2)
    seg = Segment(30, (5, 6))
    # Two queued and one staged: the fourth finds the FIFO full (nothing plays yet).
    frames = [encode_segment(k, seg, link) for k in range(4)]
    frames += [encode_telemetry_request(0), encode_telemetry_request(1)]  # the second is BUSY
    frames += [encode_command(FrameType.START, 3), encode_segment(4, seg, link)]  # seq 3 is free again
    run, model = assert_link_equal(link, fed(frames), 1500)
    assert [r.reason for r in model.rejections] == [Reason.FULL, Reason.BUSY]
    assert model.player.played == 4


def test_disarm_drops_queued_segments_and_stops():
    link = make_link(underrun="hold")
    seg = Segment(60, (300, -200))
    frames = [encode_segment(0, seg, link), encode_segment(1, seg, link), encode_command(FrameType.START, 2),
              encode_segment(3, seg, link), encode_command(FrameType.DISARM, 4),
              encode_command(FrameType.ARM, 5), encode_telemetry_request(0)]
    run, model = assert_link_equal(link, fed(frames, spacing=2, gap=2), 700)
    assert model.player.state == PlayState.IDLE and model.player.level == 0
    assert [level for _, level in model.player.arm_changes] == [True, False, True]


# -- the linked top, end to end ----------------------------------------------------------------

def linked_case(policy: str, late: bool):
    """Two segments loaded, START, a third (late or in time), telemetry for each channel."""
    link = make_link(underrun=policy, timeout_cyc=200)
    segs = [Segment(900, (12, -9)), Segment(700, (-5, 3)), Segment(400, (7, 9), last=True)]
    chunks = [(encode_segment(0, segs[0], link), 0), (encode_segment(1, segs[1], link), 3),
              (encode_command(FrameType.START, 2), 3),
              (encode_segment(3, segs[2], link), 1800 if late else 0),
              (encode_telemetry_request(0), 1500),
              (encode_telemetry_request(1), link.reply_busy_cyc)]  # after the first reply's busy time
    return link, segs, schedule(chunks, link.bit_cyc, first=10)


@pytest.mark.parametrize(("policy", "late"), [("rest", False), ("rest", True), ("hold", True)])
def test_linked_top_outputs_equal_the_model(policy, late):
    link, segs, wire = linked_case(policy, late)
    cycles = wire[-1].start + 3500
    strobes = periodic_strobe_edges(cycles, 61, 3, first=7)
    run = run_linked(link, wire, cycles, strobe_edges=strobes)
    model = LinkModel(link)
    model.feed_all(arrivals(wire, link.bit_cyc))
    model.finish(cycles)
    stim = link_stimulus(model.player, cycles, strobes)
    expected = run_model(link.hw, stim)
    assert run.edges == expected.edges  # every output pulse, to the cycle
    assert model.player.underruns == (1 if late else 0) and run.status["underruns"] == model.player.underruns
    # Telemetry: decoded replies with the link's fields and the emulator's books.
    payloads = reply_payloads(link, run.tx)
    replies = [parse_telemetry(payload, link) for payload in payloads]
    assert [t.channel for t in replies] == [0, 1]
    for payload, tm, (cycle, fields) in zip(payloads, replies, model.replies, strict=True):
        assert tm.next_seq == fields["next_seq"] == 4 and tm.played == fields["played"]
        at = run_model(link.hw, link_stimulus(model.player, cycle, strobes))
        # Every byte of the reply: the link model's fields with the reference model's
        # status and books at the request's cycle.
        assert payload == pack_telemetry(reply_values(fields, at), link)
        ch = tm.channel
        pos, neg = at.counts(ch)
        # Snapshot at the request's cycle: counts of pulses whose line is high by then.
        assert (tm.pos, tm.neg) == (pos, neg)
        books = at.channels[ch]
        assert (tm.pend_pos, tm.pend_neg, tm.owed) == (books.pend_pos, books.pend_neg, books.owed)
        assert tm.strobes == at.status.strobes
        assert not any(tm.flags.values())  # no clamp, no saturation: the books are exact
    if policy == "rest" or not late:
        # Conservation (docs/timing.md): everything the program asked for is accounted for.
        want = [sum(s.rates[ch] * s.duration for s in segs) for ch in range(2)]
        for tm in replies:
            net = tm.pos - tm.neg + tm.pend_pos - tm.pend_neg
            assert (net << HW.frac_bits) + tm.owed == want[tm.channel]


def reply_payloads(link: LinkParams, tx) -> list[bytes]:
    """The payloads of the telemetry replies among the bytes a board sent (``LinkedRun.tx``)."""
    decoder = FrameDecoder(host_lengths(link))
    return [e.payload for _, b in tx for e in decoder.feed(b) if isinstance(e, Frame)]


def test_linked_top_stays_idle_without_the_arm_pin():
    link, _, wire = linked_case("rest", False)
    cycles = wire[-1].start + 200
    run = run_linked(link, wire, cycles, strobe_edges=periodic_strobe_edges(cycles, 61, 3), arm_pin=0)
    assert run.edges == () and run.status["played"] == 3


def test_linked_verilog_names_the_pins():
    text = write_linked_verilog(LINK)
    for port in ("rx", "tx", "strobe", "arm", "x_pos", "y_neg", "armed", "starved"):
        assert f" {port};" in text or f" {port} " in text or f" {port}," in text
    assert "module dvgate_linked" in text


def test_board_accepts_only_host_frame_types():
    assert set(board_lengths(LINK)) == {1, 2, 3, 4, 5, 6, 7}
    assert FrameType.TELEMETRY_REPLY not in board_lengths(LINK)
    # An unknown type, and a FAULT frame of the wrong length: format errors.
    model = model_of(LINK, fed([encode_frame(0x08, b"\x00"), encode_frame(FrameType.FAULT, b"\x00")]), 200)
    assert [r.reason for r in model.rejections] == [Reason.FORMAT] * 2
