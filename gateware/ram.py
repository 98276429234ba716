"""Block RAM reads that need no read-during-write logic, and the tests' check of that.

Every memory here is read and written by one pipeline or state machine that never reads
a word on the cycle that writes it. Two things make synthesis leave such a collision
unspecified, as block RAM gives it, instead of adding flip-flops and multiplexers beside
the RAM to define it:

- the memory carries :data:`NO_RW_CHECK`;
- its reads are made by :func:`sync_read`. Yosys (0.70) takes an Amaranth synchronous
  read port for one that must return the old word on a collision, which the iCE40 block
  RAM cannot, and adds a bypass register and a multiplexer per data bit whatever the
  attribute says (its log: ``emulate_read_first``). An asynchronous read followed by a
  register, which it merges into the RAM's port itself, honours the attribute.

:func:`read_data` lets the tests poison collided reads, to show none is used.
"""

from __future__ import annotations

from dataclasses import dataclass

from amaranth.hdl import Module, Mux, Signal, Value
from amaranth.lib import memory

#: Attributes of a memory none of whose reads uses a word written on the same cycle.
NO_RW_CHECK = {"no_rw_check": 1}
#: Tests set this to give every read of such a memory that collides with a write an
#: unusable result (the complement of the word), as block RAM may, to show that no such
#: read is ever used. Read at elaboration.
POISON_COLLISIONS = False


@dataclass
class SyncRead:
    """A synchronous read port: ``data`` is the word at ``addr`` one cycle later.

    ``data`` keeps its value on a cycle whose ``en`` is 0 (``en`` is 1 unless driven).
    """

    addr: Value
    en: Signal
    data: Signal


def sync_read(m: Module, mem: memory.Memory) -> SyncRead:
    """A read of ``mem`` with the cycles of ``read_port(transparent_for=())``, built so that
    Yosys adds no read-during-write logic (see the module's docstring)."""
    port = mem.read_port(domain="comb")
    en = Signal(init=1)
    data = Signal(mem.shape)
    with m.If(en):
        m.d.sync += data.eq(port.data)
    return SyncRead(port.addr, en, data)


def read_data(m: Module, read: SyncRead, write: memory.WritePort) -> Value:
    """The data of a read of a ``NO_RW_CHECK`` memory (poisoned as the tests ask).

    With :data:`POISON_COLLISIONS`, a read whose address ``write`` writes on the same
    cycle gives the complement of the word on the next.
    """
    if not POISON_COLLISIONS:
        return read.data
    collided = Signal(name="collided")
    m.d.sync += collided.eq(write.en.any() & read.en & (write.addr == read.addr))
    return Mux(collided, ~read.data, read.data)
