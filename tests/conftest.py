from __future__ import annotations

import random
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay_data" / "parcels.jsonl.gz"


def phishing() -> list[tuple[dict[str, float], int]]:
    """river's bundled Phishing dataset (1,250 events, 9 numeric features)."""
    from river import datasets

    return [({k: float(v) for k, v in x.items()}, int(y)) for x, y in datasets.Phishing()]


def sparse_stream(n: int, seed: int) -> list[tuple[dict[str, object], int]]:
    """Invented events whose features come and go: numeric at different scales, one-hot strings,
    booleans, a feature that appears late and one that vanishes."""
    rnd = random.Random(seed)
    out = []
    for i in range(n):
        x: dict[str, object] = {"route_km": rnd.gammavariate(3, 14)}
        if rnd.random() < 0.7:
            x["weight_g"] = rnd.lognormvariate(7, 1)
        if rnd.random() < 0.5:
            x["depot"] = rnd.choice(["Harbourside", "Millbrook", "Eastgate"])
        if i < n // 2:
            x["old_scanner"] = rnd.random() < 0.3
        if i > n // 3:
            x["stops_before"] = float(rnd.randint(0, 20))
        z = -1 + 0.02 * x["route_km"] + (0.5 if x.get("depot") == "Millbrook" else 0.0)  # type: ignore[operator]
        y = int(rnd.random() < 1 / (1 + 2.718281828 ** (-z)))
        out.append((x, y))
    return out


@pytest.fixture(scope="session")
def phishing_data() -> list[tuple[dict[str, float], int]]:
    return phishing()


class RunningServer:
    """A daemon serving in a thread of this process, on the ports its settings name."""

    def __init__(self, settings, learner) -> None:  # type: ignore[no-untyped-def]
        import threading

        import zmq
        from oddsmill.server import Server

        self.server = Server(settings, learner)
        self.stop = threading.Event()
        self.ctx = zmq.Context()
        self.thread = threading.Thread(target=self.server.serve, args=(self.stop, self.ctx), daemon=True)
        self.thread.start()
        assert self.server.ready.wait(10), "the daemon did not start"

    def close(self) -> None:
        """Stop (with its final checkpoint) and wait; close the test's own sockets first."""
        self.stop.set()
        self.thread.join(10)
        self.ctx.term()
