"""Where the daemon's time goes without the sockets: `Engine.process` (and a race of candidates) on
blocks of already-decoded messages, and the decode-and-process path a restart replays the journal
through. Figures are per event, best of a few rounds; ratios in one run are what to compare.

    python scripts/profile_engine.py [--blocks N] [--rounds R] [--json]

Shapes: columnar blocks of 500 rows by 20 numeric columns; batches of 500 events with 20 named
numeric features each; the auto race's candidates on the columnar blocks; and the journal
path (msgpack bytes decoded, then processed) for batches and for columnar blocks.
"""

from __future__ import annotations

import argparse
import json
import time
from collections.abc import Callable
from typing import Any

import msgpack
import numpy as np
from oddsmill import kernel as K
from oddsmill.encoding import BlockBuilder
from oddsmill.engine import Engine
from oddsmill.learner import Learner
from oddsmill.protocol import decode_body, unpack
from oddsmill.race import Race, auto_candidates
from oddsmill.settings import LearnerSettings

ROWS, COLS = 500, 20
NAMES = [f"f{j}" for j in range(COLS)]


def bodies(blocks: int, seed: int = 1) -> tuple[list[bytes], list[bytes]]:
    """The same events as msgpack bodies: columnar blocks, and batches of maps."""
    rng = np.random.default_rng(seed)
    beta = rng.normal(size=COLS) * 0.3
    cols, batches = [], []
    for _ in range(blocks):
        x = rng.normal(size=(ROWS, COLS)) * np.geomspace(1, 1e3, COLS)
        y = (rng.random(ROWS) < 1 / (1 + np.exp(-(x / np.geomspace(1, 1e3, COLS)) @ beta))).astype(float)
        cols.append(
            msgpack.packb({"cols": NAMES, "rows": x.astype("<f8").tobytes(), "y": y.astype(np.uint8).tobytes()})
        )
        batches.append(
            msgpack.packb(
                {
                    "batch": [
                        {"x": dict(zip(NAMES, r.tolist(), strict=True)), "y": int(v)} for r, v in zip(x, y, strict=True)
                    ]
                }
            )
        )
    return cols, batches


def items_of(raws: list[bytes]) -> list[list[tuple[float, Any]]]:
    return [[(0.0, it) for it in decode_body(unpack(raw))] for raw in raws]


def per_event(make: Callable[[], Callable[[list[Any]], object]], blocks: list[Any], rounds: int) -> float:
    """Best microseconds per event over `rounds` fresh runs (the first block warms, untimed)."""
    best = float("inf")
    for _ in range(rounds):
        run = make()
        run(blocks[0])
        t0 = time.perf_counter()
        for b in blocks[1:]:
            run(b)
        best = min(best, (time.perf_counter() - t0) / ((len(blocks) - 1) * ROWS) * 1e6)
    return best


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--blocks", type=int, default=200)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args()
    cols_raw, batch_raw = bodies(a.blocks)
    cols, batches = items_of(cols_raw), items_of(batch_raw)

    def engine() -> Callable[[list[Any]], object]:
        return Engine(Learner()).process

    def race() -> Callable[[list[Any]], object]:
        return Race(auto_candidates(LearnerSettings())).process

    def replay(eng: Engine) -> Callable[[bytes], object]:
        return lambda raw: eng.process([(0.0, it) for it in decode_body(unpack(raw))])

    def kernel_only() -> Callable[[Any], object]:
        lr = Learner()
        return lr.run

    blocks = []
    for raw in cols_raw:
        (c,) = decode_body(unpack(raw))
        b = BlockBuilder()
        b.add_rows(np.arange(COLS), c.rows, np.full(ROWS, K.OP_TRAIN), c.y)
        blocks.append(b.build())

    fig = {
        "kernel_us": per_event(kernel_only, blocks, a.rounds),
        "cols_us": per_event(engine, cols, a.rounds),
        "batch_us": per_event(engine, batches, a.rounds),
        "race_cols_us": per_event(race, cols, max(1, a.rounds - 1)),
        "journal_cols_us": per_event(lambda: replay(Engine(Learner())), cols_raw, a.rounds),
        "journal_batch_us": per_event(lambda: replay(Engine(Learner())), batch_raw, a.rounds),
        "decode_batch_us": per_event(lambda: lambda raw: decode_body(unpack(raw)), batch_raw, a.rounds),
    }
    fig["race_over_single"] = fig["cols_us"] / fig["race_cols_us"]
    if a.json:
        print(json.dumps(fig, indent=2))
        return
    for k, v in fig.items():
        print(f"{k:>20}  {v:8.3f}")


if __name__ == "__main__":
    main()
