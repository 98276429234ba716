"""The compact forms of a long stimulus: Cycles and RateChanges read like the tuples they replace."""

import dataclasses
import pickle

import numpy as np
import pytest
from conftest import small_params

from dvgate.sim.model import armed_intervals
from dvgate.sim.stimulus import integral
from dvgate.sim.trace import Cycles, RateChange, RateChanges, Stimulus


def test_cycles_read_like_a_tuple():
    edges = Cycles([3, 6, 20, 41])
    assert edges == (3, 6, 20, 41) and (3, 6, 20, 41) == edges and edges != (3, 6, 20)
    assert list(edges) == [3, 6, 20, 41] and all(type(e) is int for e in edges)
    assert edges[1] == 6 and edges[-1] == 41 and type(edges[0]) is int
    assert edges[0::2] == (3, 20) and isinstance(edges[0::2], Cycles)
    assert len(edges) == 4 and 20 in edges and hash(edges) == hash((3, 6, 20, 41))
    assert np.asarray(edges).dtype == np.int64 and np.asarray(edges) is edges.array
    with pytest.raises(ValueError):
        edges.array[0] = 1  # read-only: a Stimulus is frozen


def test_rate_changes_read_like_a_tuple_of_records():
    want = (RateChange(5, 0, 7), RateChange(5, 1, -3), RateChange(9, 0, 0))
    changes = RateChanges([5, 5, 9], [0, 1, 0], [7, -3, 0])
    assert changes == want and want == changes and tuple(changes) == want and changes != want[:2]
    assert changes[1] == want[1] and changes[1:] == want[1:] and isinstance(changes[1:], RateChanges)
    assert RateChanges.of(want) == changes and RateChanges.of(changes) is changes
    assert hash(changes) == hash(want) and len(RateChanges([], [], [])) == 0
    with pytest.raises(ValueError, match="one of each per change"):
        RateChanges([1, 2], [0], [5, 5])


def test_a_stimulus_of_compact_forms_equals_the_plain_one():
    plain = Stimulus(cycles=50, strobe_edges=(3, 6), rate_changes=(RateChange(10, 1, -5),))
    compact = dataclasses.replace(plain, strobe_edges=Cycles([3, 6]), rate_changes=RateChanges([10], [1], [-5]))
    assert compact == plain and hash(compact) == hash(plain)
    assert pickle.loads(pickle.dumps(compact)) == plain


@pytest.mark.parametrize(("changes", "match"), [
    (dict(strobe_edges=Cycles([3, 3])), "strobe_edges must be strictly increasing"),
    (dict(strobe_edges=Cycles([-1, 3])), "strobe edge at cycle -1: cycles start at 0"),
    (dict(rate_changes=RateChanges([4, 2], [0, 0], [1, 1])), "rate_changes must be sorted by cycle"),
    (dict(rate_changes=RateChanges([0, 2], [0, 0], [1, 1])), "rate change at cycle 0: changes start at cycle 1"),
])
def test_compact_forms_are_checked_as_the_tuples(changes, match):
    with pytest.raises(ValueError, match=match):
        Stimulus(cycles=10, **changes)


def test_the_integral_reads_the_compact_changes_as_the_tuples():
    params = small_params(names=("x", "y"), init_rates=(64, -5))
    plain = Stimulus(cycles=200, strobe_edges=(), arm_changes=((3, True),),
                     rate_changes=(RateChange(40, 0, 9), RateChange(40, 1, -4), RateChange(120, 0, -2)))
    compact = dataclasses.replace(plain, rate_changes=RateChanges.of(plain.rate_changes))
    armed = armed_intervals(plain)
    for ch in range(2):
        for upto in (None, 40, 41, 150):
            want = integral(params, plain, ch, armed, upto)
            assert integral(params, compact, ch, armed, upto) == want
    # Worked by hand for channel 0 from the first armed cycle 4: initial rate to 40, 9 to 120, -2 after.
    r0 = params.rates[0]
    assert integral(params, compact, 0, armed) == r0 * 36 + 9 * 80 - 2 * 80
