"""Property tests of the decoder: whatever arrives, it returns messages or the project's protocol
error, nothing else, and a rejected body changes no state."""

from __future__ import annotations

import msgpack
from hypothesis import given, settings
from hypothesis import strategies as st
from oddsmill.engine import Engine
from oddsmill.errors import ProtocolError
from oddsmill.learner import Learner
from oddsmill.protocol import Columns, Event, decode_body, unpack

from tests.tools import names_in

scalars = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.integers(min_value=10**308)
    | st.floats()
    | st.text(max_size=8)
    | st.binary(max_size=24)
)
values = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6) | st.integers(), inner, max_size=4),
    max_leaves=12,
)
keys = st.sampled_from(["id", "x", "y", "w", "ts", "src", "seq", "batch", "cols", "rows"]) | st.text(max_size=5)
bodies = st.dictionaries(keys, values, max_size=6) | values


@settings(max_examples=400, deadline=None)
@given(st.binary(max_size=200))
def test_arbitrary_bytes_decode_or_raise_the_protocol_error(raw: bytes) -> None:
    try:
        body = unpack(raw)
    except ProtocolError as e:
        # a header may claim a string or array beyond a limit before the bytes run out
        assert e.reason in ("undecodable", "too_large")
        return
    for item in decode_body(body):
        assert isinstance(item, Event | Columns | ProtocolError)


@settings(max_examples=400, deadline=None)
@given(bodies)
def test_arbitrary_structures_give_messages_or_protocol_errors_and_rejections_change_nothing(body: object) -> None:
    items = decode_body(body)
    for item in items:
        assert isinstance(item, Event | Columns | ProtocolError)
    # through msgpack and back, as a producer would send it
    try:
        again = decode_body(unpack(msgpack.packb(body)))
    except (TypeError, ValueError, OverflowError):  # not representable in msgpack at all
        again = items
    assert len(again) == len(items)
    engine = Engine(Learner())
    before = engine.learner.state_dict()
    errors = [(0.0, item) for item in items if isinstance(item, ProtocolError)]
    engine.process(errors)
    after = engine.learner.state_dict()
    assert after["slots"].tobytes() == before["slots"].tobytes() and names_in(after) == names_in(before)
    assert engine.metrics.count == 0 and not engine.pending


@settings(max_examples=400, deadline=None)
@given(st.lists(bodies, max_size=5))
def test_the_engine_takes_any_decoded_items_without_raising(batch: list[object]) -> None:
    engine = Engine(Learner())
    items = [(0.0, item) for body in batch for item in decode_body(body)]
    results = engine.process(items)
    for _, r in results:
        assert r.__class__.__name__ in ("Score", "ColumnScores", "Rejection")


class _Forgetful(dict):  # type: ignore[type-arg]
    """A shapes cache that never keeps anything: every event takes the full encoding path."""

    def __setitem__(self, key: object, value: object) -> None:
        pass


feature_values = (
    st.floats()
    | st.integers(min_value=-(10**20), max_value=10**20)
    | st.integers(min_value=10**308)
    | st.booleans()
    | st.none()
    | st.sampled_from(["Harbourside", "Millbrook", "a=b"])
)
feature_maps = st.dictionaries(st.sampled_from(["route_km", "weight_g", "stops", "depot", "a"]), feature_values)


@settings(max_examples=300, deadline=None)
@given(st.lists(feature_maps, min_size=1, max_size=12))
def test_the_remembered_slots_of_a_name_set_encode_as_the_full_path_does(events: list[dict[str, object]]) -> None:
    """encode_features remembers the slots of a set of numeric names; an event taking that path
    must encode (or be refused) exactly as the full path would, whatever its values."""
    from oddsmill.encoding import encode_features
    from oddsmill.vocabulary import Vocabulary

    fast, full = Vocabulary(max_features=4), Vocabulary(max_features=4)
    full.shapes = _Forgetful()
    for x in events * 3:  # each map again once its names are known
        outcomes = []
        for vocab in (fast, full):
            try:
                slots, values, created = encode_features(x, vocab, grow=True)
                outcomes.append((list(slots), values, created))  # (remembered slots come as a shared tuple)
            except ProtocolError as e:
                outcomes.append((e.reason, e.detail))
        assert outcomes[0] == outcomes[1]
        assert fast.names == full.names and fast.ignored == full.ignored
    assert not full.shapes


def test_a_name_sent_as_a_string_then_as_a_number_keeps_its_numeric_slot() -> None:
    """Found by the test above: the one-hot of a key (value 1.0 once encoded) was remembered as the
    slots of the key's name set, and the next number under that key went to the one-hot's slot."""
    from oddsmill.encoding import encode_features
    from oddsmill.vocabulary import Vocabulary

    v = Vocabulary(max_features=10)
    for x in ({"route_km": 0.5}, {"route_km": "Harbourside"}, {"route_km": "Harbourside"}):
        encode_features(x, v)
    assert v.names == ["route_km", "route_km=Harbourside"]
    assert encode_features({"route_km": 2.0}, v)[:2] == ([0], [2.0])


def _comparable(item: object) -> object:
    if isinstance(item, ProtocolError):
        return ("error", item.reason, item.detail, item.event_id)
    if isinstance(item, Columns):
        return ("cols", item.cols, item.rows.tobytes(), item.y.tobytes(), item.ids, item.ts, item.src, item.seq)
    return item


@settings(max_examples=400, deadline=None)
@given(st.lists(bodies, max_size=6))
def test_a_batch_decodes_as_its_bodies_sent_one_by_one(items: list[object]) -> None:
    """PROTOCOL 2: a batch is each body in order, exactly as if sent one by one (a batch inside a
    batch is refused)."""
    whole = [_comparable(i) for i in decode_body({"batch": items})]
    one_by_one: list[object] = []
    for item in items:
        if isinstance(item, dict) and "batch" in item:
            one_by_one.append(("error", "not_a_map", "a batch may not hold another batch", None))
        else:
            one_by_one.extend(_comparable(i) for i in decode_body(item))
    assert whole == one_by_one
