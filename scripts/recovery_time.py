"""How long a restart takes to learn a journal tail: a journal of N events written directly (no
checkpoint after it), then `Server(...)`, which loads the state and replays the tail, timed.

    python scripts/recovery_time.py [--events 1000000] [--shape batch|cols]

Events have 20 numeric features, 500 to a record: batches of maps (`batch`) or columnar blocks
(`cols`). The target (issue 6) is under 10 s for one million events.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import msgpack
import numpy as np
from oddsmill.server import Server, ServerSettings
from oddsmill.storage import JournalWriter

ROWS, COLS = 500, 20
NAMES = [f"f{j}" for j in range(COLS)]


def write_journal(state: Path, events: int, shape: str) -> None:
    rng = np.random.default_rng(7)
    journal = JournalWriter(state / f"journal-{0:012d}.omj")
    for _ in range(events // ROWS):
        x = rng.normal(size=(ROWS, COLS))
        y = (rng.random(ROWS) < 0.3).astype(np.uint8)
        if shape == "cols":
            body = {"cols": NAMES, "rows": x.astype("<f8").tobytes(), "y": y.tobytes()}
        else:
            rows = [dict(zip(NAMES, r.tolist(), strict=True)) for r in x]
            body = {"batch": [{"x": r, "y": int(v)} for r, v in zip(rows, y, strict=True)]}
        journal.append(time.time(), msgpack.packb(body))
    journal.sync()
    journal.close()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--events", type=int, default=1_000_000)
    ap.add_argument("--shape", choices=["batch", "cols"], default="batch")
    a = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="oddsmill-recovery-") as tmp:  # (250 MB of journal)
        state = Path(tmp)
        write_journal(state, a.events, a.shape)
        settings = ServerSettings(state_dir=state, http="off")
        t0 = time.perf_counter()
        server = Server(settings)
        seconds = time.perf_counter() - t0
        step = server.engine.learner.step
        server.journal.close()
    print(f"{a.shape}: replayed {step:,} events in {seconds:.1f} s ({seconds / max(step, 1) * 1e6:.2f} us an event)")


if __name__ == "__main__":
    main()
