"""Decoding ingest bodies (PROTOCOL 2): table-driven cases."""

from __future__ import annotations

import msgpack
import numpy as np
import pytest
from oddsmill.errors import ProtocolError
from oddsmill.protocol import MAX_DEPTH, MAX_ITEMS, MAX_MESSAGE, MAX_STR, Columns, Event, decode_body, unpack


@pytest.mark.parametrize(
    "body,reason",
    [
        ([1, 2], "not_a_map"),
        ({"id": "P1", "x": {"a": 1}, "label": 1}, "not_a_map"),
        ({"x": [1, 2]}, "bad_features"),
        ({"y": 1}, "bad_features"),
        ({"id": "P1", "y": 2}, "bad_label"),
        ({"id": "P1", "y": "yes"}, "bad_label"),
        ({"x": {"a": 1}, "y": 1, "w": 0}, "bad_weight"),
        ({"x": {"a": 1}, "y": 1, "w": "heavy"}, "bad_weight"),
        ({"x": {"a": 1}, "y": 1, "w": float("inf")}, "non_finite"),
        ({"x": {"a": 1}, "y": 1, "w": 10**400}, "non_finite"),  # JSON integers have no bound
        ({"x": {"a": 1}, "ts": 10**400}, "non_finite"),
        ({"x": {"a": 1}, "seq": -1}, "not_a_map"),
        ({"cols": ["a", "b"], "rows": b"\x00" * 12}, "bad_features"),
        ({"cols": ["a"], "rows": np.array([np.nan]).tobytes()}, "non_finite"),
        ({"cols": ["a"], "rows": np.zeros(2).tobytes(), "y": b"\x00\x07"}, "bad_label"),
    ],
)
def test_bad_bodies_are_rejected_with_their_reason(body: object, reason: str) -> None:
    (item,) = decode_body(body)
    assert isinstance(item, ProtocolError)
    assert item.reason == reason
    assert item.detail


def test_events_of_each_kind() -> None:
    (train,) = decode_body({"x": {"route_km": 3}, "y": True, "w": 2, "src": "depot-7", "seq": 4})
    assert train == Event(None, {"route_km": 3}, 1, 2.0, None, "depot-7", 4)
    (outcome,) = decode_body({"id": 17, "y": 0})
    assert outcome.x is None and outcome.y == 0 and outcome.id == 17  # type: ignore[union-attr]


def test_a_batch_is_its_bodies_one_by_one() -> None:
    items = decode_body({"batch": [{"x": {"a": 1}}, {"x": {"a": 1}, "y": 5}, {"id": "P", "y": 1}]})
    assert isinstance(items[0], Event) and isinstance(items[2], Event)
    assert isinstance(items[1], ProtocolError) and items[1].reason == "bad_label"


def test_columnar_block() -> None:
    rows = np.array([[1.0, 2.0], [3.0, 4.0], [5.0, 6.0]])
    (block,) = decode_body(
        {
            "cols": ["a", "b"],
            "rows": rows.astype("<f8").tobytes(),
            "y": bytes([1, 255, 0]),
            "id": ["x", "y", "z"],
        }
    )
    assert isinstance(block, Columns)
    np.testing.assert_array_equal(block.rows, rows)
    assert np.isnan(block.y[1]) and block.y[0] == 1.0 and block.y[2] == 0.0
    assert block.ids == ("x", "y", "z")


def test_unpack_rejects_bytes_that_are_not_msgpack() -> None:
    assert unpack(msgpack.packb({"x": {"a": 1}})) == {"x": {"a": 1}}
    with pytest.raises(ProtocolError) as e:
        unpack(b"\xc1")
    assert e.value.reason == "undecodable"


@pytest.mark.parametrize(
    "x",
    [
        {"depot": "north", "depot=north": 1.0},  # a feature and a one-hot with one name
        {"a": "b=c", "a=b": "c"},  # two one-hots with one name
    ],
)
def test_features_that_encode_to_one_name_are_refused_and_add_nothing(x: dict) -> None:  # type: ignore[type-arg]
    from oddsmill.encoding import encode_features
    from oddsmill.vocabulary import Vocabulary

    vocab = Vocabulary(max_features=100)
    with pytest.raises(ProtocolError) as e:
        encode_features(x, vocab)
    assert e.value.reason == "bad_features"
    assert vocab.names == []


def test_a_rejected_event_adds_no_name() -> None:
    from oddsmill.encoding import encode_features
    from oddsmill.vocabulary import Vocabulary

    vocab = Vocabulary(max_features=100)
    with pytest.raises(ProtocolError):
        encode_features({"route_km": 3.0, "depot": "north", "weight_kg": float("nan")}, vocab)
    assert vocab.names == []


def test_a_feature_too_large_for_a_float_is_rejected() -> None:
    from oddsmill.encoding import encode_features
    from oddsmill.vocabulary import Vocabulary

    with pytest.raises(ProtocolError) as e:
        encode_features({"route_km": 10**400}, Vocabulary(max_features=10))
    assert e.value.reason == "non_finite"


@pytest.mark.parametrize(
    ("raw", "reason"),
    [
        (b"\x00" * (MAX_MESSAGE + 1), "too_large"),  # refused before decoding
        (msgpack.packb({"x": {"note": "z" * (MAX_STR + 1)}}), "too_large"),
        (msgpack.packb({"batch": [0] * (MAX_ITEMS + 1)}), "too_large"),
        (b"\x91" * (MAX_DEPTH + 1) + b"\x01", "too_large"),  # nested deeper than the decoder's stack
        (b"\xd4\x00\x00", "undecodable"),  # an extension type: not part of the protocol
        (b"\xc1", "undecodable"),
    ],
)
def test_limits_of_the_decoder(raw: bytes, reason: str) -> None:
    with pytest.raises(ProtocolError) as e:
        unpack(raw)
    assert e.value.reason == reason
    assert unpack(b"\x91" * MAX_DEPTH + b"\x01") is not None  # the deepest accepted
