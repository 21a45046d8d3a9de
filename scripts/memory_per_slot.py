"""Memory a vocabulary slot costs: learn events of 20 one-hot names each (as customer ids would
arrive, with a few numeric features beside them) until the vocabulary holds N names, and report
the growth of the process's resident memory per slot, beside the bytes of the state arrays and of
the vocabulary's arrays alone. `--encode-only` grows the vocabulary without learning (the figure
of earlier sessions); `--glibc-threshold` leaves glibc's mmap threshold as it is (the daemon fixes
it: learner.give_back_large_frees, and keeps the heap's free top: learner.keep_freed_heap).

    python scripts/memory_per_slot.py [--slots N] [--encode-only] [--glibc-threshold]
"""

from __future__ import annotations

import argparse
import ctypes
import gc

import numpy as np
from oddsmill import kernel as K
from oddsmill.encoding import BlockBuilder
from oddsmill.learner import Learner, give_back_large_frees, keep_freed_heap
from oddsmill.settings import LearnerSettings


def resident_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS in /proc/self/status")


def grow(lr: Learner, n: int, encode_only: bool) -> None:
    """Blocks of 500 events of 20 new ids each and two numeric features, until n slots."""
    rng = np.random.default_rng(0)
    k = 0
    while len(lr.vocab) < n:
        block = BlockBuilder()
        for _ in range(500):
            x: dict[str, object] = {f"f{j}": f"customer-{k * 20 + j:08d}" for j in range(20)}
            x["route_km"] = float(rng.gamma(2.0, 10.0))
            x["express"] = float(rng.random() < 0.3)
            slots, values = lr.encode(x)
            block.add(slots, values, K.OP_TRAIN, float(rng.random() < 0.2), 1.0)
            k += 1
        if not encode_only:
            lr.run_segments(block.segments())


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slots", type=int, default=1_000_000)
    ap.add_argument("--encode-only", action="store_true")
    ap.add_argument("--glibc-threshold", action="store_true", help="keep glibc's own mmap threshold")
    args = ap.parse_args()
    n = args.slots
    if not args.glibc_threshold:
        give_back_large_frees()  # as `oddsmill serve` does
        keep_freed_heap()
    # A first learner of a few thousand slots loads every compiled function the loop calls (the
    # table's growth included): code, not memory a slot.
    grow(Learner(LearnerSettings(max_features=2 * n)), 5_000, args.encode_only)
    lr = Learner(LearnerSettings(max_features=2 * n))
    gc.collect()
    before = resident_bytes()
    grow(lr, n, args.encode_only)
    gc.collect()
    grown = resident_bytes() - before
    slots = len(lr.vocab)
    arrays = sum(a.nbytes for a in lr.arrays(0)[1:])
    learned = "" if args.encode_only else f", {lr.step:,} events learned"
    print(f"{slots:,} slots{learned}: resident memory +{grown / slots:.0f} bytes a slot")
    cap = lr.arrays(0)[2].shape[0]
    print(f"state arrays: {arrays / slots:.0f} bytes a slot (capacity {cap:,} slots: unused rows are not resident)")
    print(f"vocabulary arrays: {lr.vocab.nbytes / slots:.0f} bytes a slot ({len(lr.vocab.index):,} names in its dict)")
    try:  # the heap memory glibc's allocator keeps after frees (the events' objects, grown arrays)
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        return
    trimmed = resident_bytes() - before
    print(f"after malloc_trim (free heap memory returned): +{trimmed / slots:.0f} bytes a slot")


if __name__ == "__main__":
    main()
