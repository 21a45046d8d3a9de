"""The oddsmill client library: stream events to a daemon, receive its scores.

Depends on pyzmq and msgpack only (nothing from the daemon's package), so an application can use it
alone.

    from oddsmill_client import Producer, ScoreSubscriber

    with ScoreSubscriber("tcp://127.0.0.1:7572") as scores, Producer("tcp://127.0.0.1:7571", src="depot-7") as out:
        out.send({"id": "P000470", "x": {"route_km": 25.5, "depot": "Harbourside"}})
        topic, score = scores.receive(timeout=5.0)
"""

from __future__ import annotations

from .keys import CurveKeys
from .producer import Producer
from .sockets import NoAnswer
from .subscriber import ScoreSubscriber

__all__ = ["CurveKeys", "NoAnswer", "Producer", "ScoreSubscriber"]
