"""What the journal's writes cost oddsmill's columnar rate on this machine: oddsmill beside a copy
of itself whose journal's bytes go into a ring in memory (touched before the load, so its pages are
in place) instead of the file. Alternating pairs on the bench's columnar load (`bench.throughput`),
each pair's ratio, and their median.

The copy replaces the `os.writev` of storage.py only: the path columnar blocks take. It keeps
nothing (it writes next to nothing to its files, which the script counts and prints) and is
started by this script alone. What it removes is the write into the page cache (new pages, filled by a copy
of each body) and the disk's work after it (the fsync thread's writeback), so its rate is what a
journal costing no more than one copy into memory already in place would allow.

    python scripts/journal_cost.py [--events 8000000] [--pairs 6]
"""

from __future__ import annotations

import argparse
import statistics
import sys
from pathlib import Path

from oddsmill import bench

MEMORY_JOURNAL = r"""
import os, sys, types
import numpy as np
from oddsmill import storage
ring = np.ones(64 << 20, np.uint8)  # written once: its pages are in place before the load
at = 0
def writev(fd, parts):
    global at
    n = 0
    for part in parts:
        b = np.frombuffer(part, np.uint8)
        if at + b.shape[0] > ring.shape[0]:
            at = 0
        ring[at:at + b.shape[0]] = b
        at += b.shape[0]
        n += b.shape[0]
    return n
shim = types.ModuleType("os")
shim.__dict__.update(os.__dict__)
shim.writev = writev
storage.os = shim
from oddsmill.cli import main
sys.exit(main(sys.argv[1:]))
"""
KINDS = ("file", "memory")


def written(server: bench.Running) -> dict[str, float]:
    """The bytes the server has handed to write(2) and writev(2) so far, its threads' included
    (/proc/PID/io's wchar: the journal's records, checkpoints and ZeroMQ's 8-byte wake-ups; not
    its sends on sockets). Not the journal files' sizes: a segment is cut to what its writer
    counted when it is closed, which the copy counts as oddsmill does."""
    for line in Path(f"/proc/{server.proc.pid}/io").read_text().splitlines():
        if line.startswith("wchar:"):
            return {"written": float(line.split()[1])}
    raise RuntimeError(f"no wchar in /proc/{server.proc.pid}/io")


def run(kind: str, events: int) -> dict[str, float]:
    serve = [sys.executable, "-c", MEMORY_JOURNAL, "serve"] if kind == "memory" else None
    return bench.throughput("oddsmill", "cols", events, before_stop=written, serve=serve)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--events", type=int, default=8_000_000)
    ap.add_argument("--pairs", type=int, default=6)
    a = ap.parse_args()
    rates: dict[str, list[float]] = {kind: [] for kind in KINDS}
    wrote: dict[str, list[float]] = {kind: [] for kind in KINDS}
    for k in range(a.pairs):
        for kind in KINDS if k % 2 == 0 else KINDS[::-1]:  # alternating order
            done = run(kind, a.events)
            rates[kind].append(done["events_per_s"])
            wrote[kind].append(done["written"])
        print(
            f"pair {k + 1}: journal to the file {rates['file'][-1]:,.0f} events/s, to memory "
            f"{rates['memory'][-1]:,.0f} ({rates['memory'][-1] / rates['file'][-1]:.2f}x)",
            flush=True,
        )
    ratio = statistics.median(m / f for m, f in zip(rates["memory"], rates["file"], strict=True))
    print(
        f"medians: journal to the file {statistics.median(rates['file']):,.0f} events/s, to memory "
        f"{statistics.median(rates['memory']):,.0f}; the paired ratio, memory over file: {ratio:.2f}x"
    )
    print(
        f"bytes written by a server over a run (write and writev): {statistics.median(wrote['file']):,.0f}, "
        f"{statistics.median(wrote['memory']):,.0f} by the copy with its journal in memory"
    )


if __name__ == "__main__":
    main()
