"""Segment FIFO and player: rate segments played back exactly on tick boundaries.

Rules: ``docs/link.md``, section "Playback". The pure-Python twin is
``dvgate.sim.link_model.PlayerModel``; tests hold the two equal cycle by cycle.
"""

from amaranth.hdl import Module, Mux, Signal, signed
from amaranth.lib import enum, memory, wiring
from amaranth.lib.wiring import In, Out

from dvgate.gateware.ram import NO_RW_CHECK, read_data, sync_read
from dvgate.gateware.rates import addr_bits
from dvgate.linkspec import COUNT_BITS, DURATION_BITS, LinkParams, PlayState

_COUNT_MAX = (1 << COUNT_BITS) - 1

def fifo_lanes(link: LinkParams) -> int:
    """Bytes of a FIFO word: a duration with its ``last`` flag, or a rate, in whole bytes."""
    return (link.word_bits + 7) // 8


class Job(enum.Enum, shape=2):
    """What the shadow-rate writer is doing."""

    NONE = 0
    STAGE = 1
    ZERO = 2


class SegmentPlayer(wiring.Component):
    """A FIFO of segments, written tentatively by the link, played into the rate registers.

    The FIFO holds ``fifo_depth`` segments of ``n + 1`` words each (a duration word with
    the ``last`` flag in bit 32, then one rate per channel) in a memory. The link writes a
    frame's words as they arrive, byte by byte into a word's lanes, at a tentative pointer
    and then commits them (the frame was good) or rolls them back (it was not), so nothing
    of a rejected frame is ever played.

    Playback goes through the emulator's shadow rate registers: a writer copies the next
    segment into the shadows ahead of time (*staging*, ``n + 2`` cycles) and a single
    commit makes every channel's new rate live on the same cycle. With the ``rest``
    underrun policy (and after the last segment of a program) the writer fills the
    shadows with zeros after each commit, so that an empty FIFO at a boundary commits
    zero rates on time.

    Parameters
    ----------
    link : LinkParams
        Channel count, rate width, FIFO depth and underrun policy.

    Attributes
    ----------
    w_data : Signal(8 * lanes), in
        A word of the frame being received, or part of one (``lanes`` bytes: the word's
        bits rounded up to whole bytes).
    w_en : Signal(lanes), in
        Write these byte lanes of ``w_data`` into the word at the tentative pointer.
    w_next : Signal(1), in
        The word is complete: advance the tentative pointer.
    w_commit : Signal(1), in
        The frame was good: its words become one queued segment.
    w_rollback : Signal(1), in
        The frame was not applied: forget its words.
    room : Signal(1), out
        The FIFO can take another segment.
    start : Signal(1), in
        Arm, and begin playback at the next cycle (when idle).
    arm_on : Signal(1), in
        Arm the outputs.
    stop : Signal(1), in
        Disarm, stop playback and drop every queued and staged segment.
    rate_addr, rate_data, rate_we, rate_commit : out
        The emulator's rate register port.
    arm : Signal(1), out
        The emulator's ``arm`` input (a register).
    play : Signal(PlayState), out
        Idle, playing or starved.
    level : Signal(16), out
        Segments waiting: queued plus staged.
    free : Signal(16), out
        Segments the FIFO can still take.
    played : Signal(32), out
        Segments started since reset (wraps).
    underruns : Signal(16), out
        Boundaries at which no segment was ready (saturating).
    """

    def __init__(self, link: LinkParams) -> None:
        self._link = link
        hw = link.hw
        super().__init__({
            "w_data": In(8 * fifo_lanes(link)),
            "w_en": In(fifo_lanes(link)),
            "w_next": In(1),
            "w_commit": In(1),
            "w_rollback": In(1),
            "room": Out(1),
            "start": In(1),
            "arm_on": In(1),
            "stop": In(1),
            "rate_addr": Out(addr_bits(hw)),
            "rate_data": Out(signed(hw.rate_bits)),
            "rate_we": Out(1),
            "rate_commit": Out(1),
            "arm": Out(1),
            "play": Out(2),
            "level": Out(16),
            "free": Out(16),
            "played": Out(32),
            "underruns": Out(COUNT_BITS),
        })
        # The reader only uses words of committed segments, which the writer never touches.
        # One word more than the segments need: never written, it reads zero for clearing.
        self.fifo = memory.Memory(shape=8 * fifo_lanes(link), depth=link.fifo_depth * link.segment_words + 1,
                                  init=[], attrs=NO_RW_CHECK)

    def elaborate(self, platform) -> Module:
        m = Module()
        link = self._link
        n = link.n
        depth_words = link.fifo_depth * link.segment_words
        rest = link.underrun == "rest"

        m.submodules.fifo = fifo = self.fifo
        wr = fifo.write_port(granularity=8)
        rd = sync_read(m, fifo)

        wr_ptr    = Signal(range(depth_words))
        wr_base   = Signal(range(depth_words))
        rd_ptr    = Signal(range(depth_words))
        queued    = Signal(range(link.fifo_depth + 1))
        state     = Signal(2, init=PlayState.IDLE)
        # Cycles to the next boundary, plus one (so a segment loads its duration as it is).
        left      = Signal(DURATION_BITS, init=1)
        staged    = Signal()
        st_dur    = Signal(DURATION_BITS)
        st_last   = Signal()
        cur_last  = Signal()
        need_zero = Signal(init=int(rest))
        job       = Signal(Job)
        j         = Signal(range(n + 2))
        rd_inc    = Signal()
        stage_end = Signal()

        playing = state == PlayState.PLAYING
        starved = state == PlayState.STARVED
        idle    = state == PlayState.IDLE

        # -- FIFO writes (tentative) --------------------------------------------------
        wr_next = Signal.like(wr_ptr)
        m.d.comb += [
            wr_next.eq(wr_ptr + 1),
            wr.addr.eq(wr_ptr),
            wr.data.eq(self.w_data),
            wr.en.eq(self.w_en),
            self.room.eq(queued < link.fifo_depth),
        ]
        with m.If(wr_ptr == depth_words - 1):
            m.d.comb += wr_next.eq(0)
        with m.If(self.w_next):
            m.d.sync += wr_ptr.eq(wr_next)
        with m.If(self.w_commit):
            m.d.sync += wr_base.eq(wr_ptr)
        with m.If(self.w_rollback):
            m.d.sync += wr_ptr.eq(wr_base)

        # -- FIFO reads ---------------------------------------------------------------
        rd_next = Signal.like(rd_ptr)
        zeroing = Signal()
        m.d.comb += [rd_next.eq(rd_ptr + 1), rd.addr.eq(Mux(zeroing, depth_words, rd_ptr))]
        with m.If(rd_ptr == depth_words - 1):
            m.d.comb += rd_next.eq(0)
        with m.If(rd_inc):
            m.d.sync += rd_ptr.eq(rd_next)

        # -- writer: stage the next segment, or clear the shadows ----------------------
        stage_ok = ((job == Job.NONE) & (queued != 0) & ~staged & ~(cur_last & playing)
                    & (~playing | (left >= link.stage_cyc + 1)))
        decide_stage = Signal()
        decide_zero  = Signal()
        m.d.comb += [
            decide_stage.eq(stage_ok),
            decide_zero.eq((job == Job.NONE) & ~stage_ok & need_zero),
        ]
        with m.If(decide_stage):
            m.d.comb += rd_inc.eq(1)
            m.d.sync += [job.eq(Job.STAGE), j.eq(1), need_zero.eq(0)]
        with m.If(decide_zero):
            m.d.sync += [job.eq(Job.ZERO), j.eq(1), need_zero.eq(0)]
        # Clearing reads the word that is never written, a cycle ahead as staging does: the
        # rates always come from the read port.
        word = read_data(m, rd, wr)
        m.d.comb += [zeroing.eq(decide_zero | (job == Job.ZERO)), self.rate_data.eq(word[:link.hw.rate_bits])]

        with m.If(job == Job.STAGE):
            with m.If(j == 1):
                m.d.sync += [st_dur.eq(word[:DURATION_BITS]), st_last.eq(word[DURATION_BITS])]
                m.d.comb += rd_inc.eq(1)
            with m.Else():
                m.d.comb += [
                    self.rate_we.eq(1),
                    self.rate_addr.eq(j - 2),
                    rd_inc.eq(j <= n),
                ]
            with m.If(j == n + 1):
                m.d.comb += stage_end.eq(1)
                m.d.sync += [job.eq(Job.NONE), staged.eq(1)]
            with m.Else():
                m.d.sync += j.eq(j + 1)
        with m.Elif(job == Job.ZERO):
            m.d.comb += [self.rate_we.eq(1), self.rate_addr.eq(j - 1)]
            with m.If(j == n):
                m.d.sync += job.eq(Job.NONE)
            with m.Else():
                m.d.sync += j.eq(j + 1)

        # -- boundaries ------------------------------------------------------------------
        boundary = playing & (left == 1)
        load     = Signal()
        end      = Signal()
        underrun = Signal()
        m.d.comb += [
            load.eq(~self.stop & (boundary | starved) & staged),
            end.eq(~self.stop & boundary & ~staged & cur_last),
            underrun.eq(~self.stop & boundary & ~staged & ~cur_last),
            self.rate_commit.eq(load | end | (underrun & rest)),
        ]
        with m.If(load):
            m.d.sync += [
                left.eq(st_dur),
                cur_last.eq(st_last),
                staged.eq(0),
                self.played.eq(self.played + 1),
                state.eq(PlayState.PLAYING),
                need_zero.eq(int(rest) | st_last),
            ]
        with m.Elif(end):
            m.d.sync += [state.eq(PlayState.IDLE), cur_last.eq(0)]
        with m.Elif(underrun):
            m.d.sync += state.eq(PlayState.STARVED)
            with m.If(self.underruns != _COUNT_MAX):
                m.d.sync += self.underruns.eq(self.underruns + 1)
        with m.Elif(playing):
            m.d.sync += left.eq(left - 1)

        with m.If(self.start & idle):
            m.d.sync += [state.eq(PlayState.PLAYING), left.eq(1)]
        with m.If(self.start | self.arm_on):
            m.d.sync += self.arm.eq(1)

        m.d.sync += queued.eq(queued + self.w_commit - stage_end)

        # -- stop: overrides everything above ---------------------------------------------
        with m.If(self.stop):
            m.d.sync += [
                state.eq(PlayState.IDLE),
                left.eq(1),
                staged.eq(0),
                cur_last.eq(0),
                queued.eq(0),
                job.eq(Job.NONE),
                need_zero.eq(int(rest)),
                self.arm.eq(0),
                rd_ptr.eq(wr_base),
            ]

        m.d.comb += [
            self.play.eq(state),
            self.level.eq(queued + staged),
            self.free.eq(link.fifo_depth - queued),
        ]
        return m
