"""The vocabulary kept in arrays (oddsmill.vocabulary) against a plain dict and list, the
representation it replaced: the same slots, names, ignored counts and checkpoints for any names."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill import vocabulary
from oddsmill.vocabulary import Vocabulary

# names from a small alphabet so that they repeat, with non-ASCII characters, a lone surrogate (a
# JSON escape can carry one), "=" and the empty name
names_st = st.text(alphabet=st.sampled_from(["a", "b", "=", "é", "字", "\ud800", "0"]), max_size=4)
calls_st = st.lists(st.tuples(st.lists(names_st, max_size=6), st.booleans()), max_size=40)


class Reference:
    """The dict-and-list vocabulary, one name at a time."""

    def __init__(self, cap: int) -> None:
        self.cap, self.names, self.index, self.ignored = cap, [], {}, 0

    def slot(self, name: str, grow: bool) -> int:
        if name in self.index:
            return self.index[name]
        if not grow:
            return -1
        if len(self.names) >= self.cap:
            self.ignored += 1
            return -1
        self.index[name] = len(self.names)
        self.names.append(name)
        return self.index[name]


@settings(max_examples=300, deadline=None)
@given(calls=calls_st, cap=st.integers(0, 12), cache=st.sampled_from([1, 3, 1 << 16]), small=st.booleans())
def test_the_same_slots_as_a_dict_and_a_list(
    calls: list[tuple[list[str], bool]], cap: int, cache: int, small: bool
) -> None:
    old = vocabulary.CACHE_NAMES, vocabulary.INITIAL_NAMES
    vocabulary.CACHE_NAMES = cache  # a tiny cache is cleared often: lookups then go to the table
    vocabulary.INITIAL_NAMES = 1 if small else old[1]  # a tiny table: names collide, and it grows
    try:
        v, ref = Vocabulary(max_features=cap), Reference(cap)
        for names, grow in calls:
            expected = [ref.slot(n, grow) for n in names]
            if len(names) == 1:
                assert v.slot(names[0], grow) == expected[0]
            else:
                assert v.slots(names, grow) == expected
            assert len(v) == len(ref.names) and v.ignored == ref.ignored
            assert len(v.index) <= max(cache, 0) and all(ref.index[n] == j for n, j in v.index.items())
        assert v.names == ref.names
        assert [v.name(j) for j in range(len(v))] == ref.names
        assert v.count_new(["a", "zz", "b"]) == sum(n not in ref.index for n in ["a", "zz", "b"])
        back = Vocabulary.from_state(cap, v.state())
        assert back.names == ref.names and back.same_names(v)
        assert back.slots(ref.names, grow=False) == list(range(len(ref.names)))
    finally:
        vocabulary.CACHE_NAMES, vocabulary.INITIAL_NAMES = old


def test_a_large_vocabulary_grows_its_table_and_keeps_every_slot() -> None:
    v = Vocabulary(max_features=300_000)
    names = [f"customer={k:07d}" for k in range(250_000)]
    assert v.slots(names[:100_000], grow=True) == list(range(100_000))
    assert v.slots(names, grow=True) == list(range(250_000))  # the first 100,000 found, the rest added
    assert 4 * len(v) <= 3 * v._table.shape[0]  # at most three quarters full
    assert v.slots(names[::-1], grow=False) == list(range(250_000))[::-1]
    old = Vocabulary.from_state(300_000, {"names": names})  # a checkpoint from before the arrays
    assert old.same_names(v) and old.name(123_456) == "customer=0123456"


def test_a_state_whose_ends_do_not_fit_its_bytes_is_refused() -> None:
    with pytest.raises(ValueError, match="do not fit"):
        Vocabulary.from_state(10, {"name_bytes": b"abc", "name_ends": [1, 5]})
    with pytest.raises(ValueError, match="do not fit"):
        Vocabulary.from_state(10, {"name_bytes": b"abc", "name_ends": [2, 1, 3]})


def test_where_names_begin_widens_to_int64_when_the_bytes_pass_the_narrow_limit(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """int32 offsets hold 2 GiB of names; past that (here a limit of 5,000 bytes, patched) they
    widen to int64 and every name keeps its slot, through a checkpoint too."""
    monkeypatch.setattr(vocabulary, "NARROW_LIMIT", 5_000)
    v = Vocabulary(max_features=10_000)
    names = [f"depot=harbour-{k:05d}" for k in range(600)]  # 19 bytes a name
    assert v.slots(names[:200], grow=True) == list(range(200))
    assert v._starts.dtype == np.int32
    assert v.slots(names, grow=True) == list(range(600))
    assert v._starts.dtype == np.int64
    assert v.slots(names[::-1], grow=False) == list(range(600))[::-1]
    assert v.name(599) == "depot=harbour-00599" and v.slot("depot=harbour-00000", grow=False) == 0
    state = v.state()
    assert state["name_ends"].dtype == np.int64 and int(state["name_ends"][-1]) == 600 * 19
    back = Vocabulary.from_state(10_000, state)
    assert back._starts.dtype == np.int64 and back.same_names(v)
