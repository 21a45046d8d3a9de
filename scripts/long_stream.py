"""A long columnar stream into a serving daemon: its rate over the whole stream, and how much of
its journal the page cache still holds at the end (the journal's bytes are dropped from it once on
disk: storage.CLEAN_BYTES). `oddsmill bench` runs last about a second; this one lasts as long as
the disk has to keep up with the journal.

    python scripts/long_stream.py [--events 20000000]

The daemon runs on its defaults, as in `oddsmill bench` (bench.Running, a state directory of its
own, removed at the end); the producer is the bench's, 500 rows of 20 numeric features a message.
Reports what util-linux's `fincore` says of the journal's segments right after the last answer and
two seconds later.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import time
from pathlib import Path

from oddsmill import bench


def cached_bytes(paths: list[Path]) -> int:
    out = subprocess.run(
        ["fincore", "--bytes", "--noheadings", "--output", "RES", *map(str, paths)],
        capture_output=True,
        text=True,
        check=True,
    )
    return sum(int(x) for x in out.stdout.split())


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--events", type=int, default=20_000_000)
    a = ap.parse_args()
    if shutil.which("fincore") is None:
        sys.exit("fincore (util-linux) is not installed")

    def look(server: bench.Running) -> dict[str, float]:
        assert server.state is not None
        segments = sorted(Path(server.state.name).glob("journal-*.omj"))
        now = cached_bytes(segments)
        time.sleep(2.0)
        return {
            "segments": len(segments),
            "journal_bytes": sum(s.stat().st_size for s in segments),
            "cached_at_end": now,
            "cached_later": cached_bytes(segments),
        }

    got = bench.throughput("oddsmill", "cols", a.events, before_stop=look)
    print(
        f"{a.events:,} events at {got['events_per_s'] / 1e6:.2f} M events/s; journal "
        f"{got['journal_bytes'] / 1e6:,.0f} MB in {got['segments']:.0f} segments, of which the page cache held "
        f"{got['cached_at_end'] / 1e6:,.1f} MB after the last answer and {got['cached_later'] / 1e6:,.1f} MB "
        "two seconds later"
    )


if __name__ == "__main__":
    main()
