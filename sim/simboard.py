"""A simulated board: the linked gateware in Amaranth's simulator behind a pseudo-terminal.

The streamer opens the pseudo-terminal's path like a real serial port. Bytes written to
it are driven onto the simulated board's receive pin bit by bit (8N1, ``bit_cyc``
cycles per bit); the board's transmit pin is decoded back into bytes and written to the
pseudo-terminal. A periodic strobe plays the computer. Simulated time runs as fast as
the simulator goes (thousands of cycles per second, far slower than a real board), so
the host must allow long reply timeouts: time is scaled, the bit-level behaviour is not.

"Unplugging" closes the pseudo-terminal: the host's port fails, and the board keeps
running on its own, into its underrun policy.
"""

from __future__ import annotations

import errno
import os
import threading
import tty
from dataclasses import dataclass

from amaranth.hdl import Module, Signal
from amaranth.sim import Simulator

from dvgate.gateware.linked_top import LinkedTop
from dvgate.linkspec import BITS_PER_BYTE, LinkParams


@dataclass(frozen=True)
class BoardState:
    """The simulated board when it stopped.

    Attributes
    ----------
    cycles : int
        Cycles simulated.
    play : int
        Playback state (:class:`dvgate.linkspec.PlayState`).
    armed : bool
        The host's arm register.
    rates : tuple of int
        Live rates.
    underruns, played, level : int
        Player counters.
    next_seq : int
        The link's next sequence number.
    bytes_in, bytes_out : int
        Bytes received from and sent to the host.
    unplugged_at : int or None
        Cycle at which the pseudo-terminal was closed.
    """

    cycles: int
    play: int
    armed: bool
    rates: tuple[int, ...]
    underruns: int
    played: int
    level: int
    next_seq: int
    bytes_in: int
    bytes_out: int
    unplugged_at: int | None


class SimBoard:
    """The linked gateware, simulated, behind a pseudo-terminal.

    Parameters
    ----------
    link : LinkParams
        The emulator and its link.
    strobe_period_cyc, strobe_width_cyc : int
        The computer's strobe, in cycles (the first one a period in).
    unplug_after_bytes : int, optional
        Close the pseudo-terminal once this many bytes have reached the board (tests).
    unplug_after_played : int, optional
        Close the pseudo-terminal once the board has started this many segments (tests).
    linger_cyc : int
        Cycles to keep simulating after an unplug before stopping by itself.

    Attributes
    ----------
    port : str
        Path of the pseudo-terminal to open as a serial port.
    """

    def __init__(self, link: LinkParams, *, strobe_period_cyc: int, strobe_width_cyc: int,
                 unplug_after_bytes: int | None = None, unplug_after_played: int | None = None,
                 linger_cyc: int = 20_000) -> None:
        if not 1 <= strobe_width_cyc < strobe_period_cyc:
            raise ValueError(f"strobe width must be 1 to {strobe_period_cyc - 1} cycles, not {strobe_width_cyc}")
        self.link = link
        self._period = strobe_period_cyc
        self._width = strobe_width_cyc
        self._unplug_after = unplug_after_bytes
        self._unplug_played = unplug_after_played
        self._linger = linger_cyc
        self._master, slave = os.openpty()
        tty.setraw(slave)  # no echo, no line editing: a clean 8-bit channel
        os.set_blocking(self._master, False)
        self.port = os.ttyname(slave)
        self._slave = slave
        self._stop = threading.Event()
        self._unplugged = threading.Event()
        self._thread: threading.Thread | None = None
        self._error: BaseException | None = None
        self.state: BoardState | None = None

    # -- control -----------------------------------------------------------------------

    def start(self) -> SimBoard:
        """Run the simulation in a background thread."""
        self._thread = threading.Thread(target=self._run_safely, name="simboard", daemon=True)
        self._thread.start()
        return self

    def stop(self, timeout: float = 60.0) -> BoardState:
        """Stop the simulation and return the board's final state."""
        self._stop.set()
        return self.join(timeout)

    def join(self, timeout: float = 600.0) -> BoardState:
        """Wait for the simulation to stop by itself (after an unplug and its linger)."""
        if self._thread is not None:
            self._thread.join(timeout)
            if self._thread.is_alive():
                raise TimeoutError("the simulated board did not stop")
        self._close()
        if self._error is not None:
            raise self._error
        assert self.state is not None
        return self.state

    def unplug(self) -> None:
        """Close the pseudo-terminal, as if the cable were pulled."""
        self._unplugged.set()

    def _close(self) -> None:
        for fd in (self._master, self._slave):
            try:
                os.close(fd)
            except OSError:
                pass
        self._master = self._slave = -1

    def _run_safely(self) -> None:
        try:
            self.run()
        except BaseException as error:  # noqa: BLE001 - handed to the thread that joins
            self._error = error

    # -- the simulation ----------------------------------------------------------------

    def run(self, max_cycles: int | None = None) -> BoardState:
        """Simulate until stopped (or ``max_cycles``), relaying bytes through the pty."""
        link = self.link
        hw = link.hw
        bit = link.bit_cyc
        top = LinkedTop(link)
        m = Module()
        m.submodules.top = top
        cycle = Signal(64)
        m.d.sync += cycle.eq(cycle + 1)
        tx_changes: list[tuple[int, int]] = []
        counts = {"in": 0, "out": 0, "unplugged": None}
        active = 1 if hw.edge_rising else 0

        scan = {"at": 0}

        def finished_bytes(now: int) -> list[int]:
            """Bytes whose stop bit the board has finished sending by cycle ``now``."""
            out = []
            changes, i = tx_changes, scan["at"]
            while True:
                while i < len(changes) and changes[i][1] != 0:
                    i += 1
                if i >= len(changes) or changes[i][0] + BITS_PER_BYTE * bit > now:
                    break
                start = changes[i][0]
                window = changes[i: i + 12]
                value = 0
                for b in range(8):
                    mid = start + (b + 1) * bit + bit // 2
                    value |= [lv for c, lv in window if c <= mid][-1] << b
                out.append(value)
                end = start + BITS_PER_BYTE * bit - bit // 2  # the middle of the stop bit
                while i < len(changes) and changes[i][0] <= end:
                    i += 1
            scan["at"] = i
            return out

        def relay_out(now: int) -> None:
            """Write the bytes the board finished sending to the host."""
            fresh = finished_bytes(now)
            if fresh and counts["unplugged"] is None:
                try:
                    os.write(self._master, bytes(fresh))
                    counts["out"] += len(fresh)
                except OSError as error:
                    if error.errno not in (errno.EAGAIN, errno.EIO):
                        raise

        def take_input() -> bytes:
            if counts["unplugged"] is not None:
                return b""
            try:
                data = os.read(self._master, 64)
            except BlockingIOError:
                return b""
            except OSError as error:
                if error.errno == errno.EIO:  # the host closed its end
                    return b""
                raise
            return data

        async def pump(ctx) -> None:
            ctx.set(top.arm, 1)
            now = 0
            while not self._stop.is_set() and (max_cycles is None or now < max_cycles):
                if counts["unplugged"] is None and self._unplugged.is_set():
                    counts["unplugged"] = now
                    os.close(self._master)
                    self._master = -1
                if counts["unplugged"] is not None and now - counts["unplugged"] >= self._linger:
                    break
                if self._unplug_played is not None and ctx.get(top.player.played) >= self._unplug_played:
                    self._unplugged.set()
                data = take_input()
                if self._unplug_after is not None and counts["in"] + len(data) >= self._unplug_after:
                    data = data[: max(0, self._unplug_after - counts["in"])]
                    self._unplugged.set()
                if not data:
                    await ctx.tick().repeat(bit)
                    now += bit
                else:
                    for value in data:
                        for k in range(BITS_PER_BYTE):
                            level = 0 if k == 0 else 1 if k == 9 else (value >> (k - 1)) & 1
                            ctx.set(top.rx, level)
                            await ctx.tick().repeat(bit)
                            now += bit
                        counts["in"] += 1
                relay_out(now)
            player, host = top.player, top.host
            self.state = BoardState(
                cycles=now, play=ctx.get(player.play), armed=bool(ctx.get(player.arm)),
                rates=tuple(ctx.get(top.emulator.rate_regs.rates[i]) for i in range(hw.n)),
                underruns=ctx.get(player.underruns), played=ctx.get(player.played), level=ctx.get(player.level),
                next_seq=ctx.get(host.next_seq), bytes_in=counts["in"], bytes_out=counts["out"],
                unplugged_at=counts["unplugged"])

        async def strobe(ctx) -> None:
            ctx.set(top.strobe, 1 - active)
            await ctx.tick().repeat(self._period)
            while self.state is None:
                ctx.set(top.strobe, active)
                await ctx.tick().repeat(self._width)
                ctx.set(top.strobe, 1 - active)
                await ctx.tick().repeat(self._period - self._width)

        async def watch_tx(ctx) -> None:
            async for level, at in ctx.changed(top.tx).sample(cycle):
                tx_changes.append((at, level))

        sim = Simulator(m)
        sim.add_clock(1e-6)
        sim.add_testbench(pump)
        sim.add_testbench(strobe)
        sim.add_process(watch_tx)
        sim.run()
        assert self.state is not None
        return self.state


def simboard_for(config, **options) -> SimBoard:  # noqa: ANN001 - a Config
    """A simulated board for a config: its link and its strobe period."""
    from dvgate.linkspec import link_params

    return SimBoard(link_params(config), strobe_period_cyc=config.strobe_period_cyc,
                    strobe_width_cyc=config.strobe_width_cyc, **options)
