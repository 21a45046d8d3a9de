"""Memory a vocabulary slot costs: grow a learner's vocabulary to N one-hot names (20 to an event,
as customer ids would arrive) and report the growth of the process's resident memory per slot,
beside the bytes of the state arrays and of the vocabulary's arrays alone.

    python scripts/memory_per_slot.py [--slots N]
"""

from __future__ import annotations

import argparse
import ctypes
import gc

from oddsmill.learner import Learner
from oddsmill.settings import LearnerSettings


def resident_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmRSS in /proc/self/status")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--slots", type=int, default=1_000_000)
    n = ap.parse_args().slots
    lr = Learner(LearnerSettings(max_features=2 * n))
    lr.learn_one({"route_km": 1.0}, 1)
    gc.collect()
    before = resident_bytes()
    k = 0
    while len(lr.vocab) < n:
        lr.encode({f"f{j}": f"customer-{k * 20 + j:08d}" for j in range(20)})
        k += 1
    gc.collect()
    grown = resident_bytes() - before
    slots = len(lr.vocab)
    arrays = sum(a.nbytes for a in (lr._sl, lr._fl, lr._wq, lr._cl))
    print(f"{slots:,} slots: resident memory +{grown / slots:.0f} bytes a slot")
    print(f"state arrays: {arrays / slots:.0f} bytes a slot (capacity {lr._sl.shape[0]:,} slots)")
    print(f"vocabulary arrays: {lr.vocab.nbytes / slots:.0f} bytes a slot ({len(lr.vocab.index):,} names in its dict)")
    try:  # the heap memory glibc's allocator keeps after frees (the events' objects, grown arrays)
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        return
    trimmed = resident_bytes() - before
    print(f"after malloc_trim (free heap memory returned): +{trimmed / slots:.0f} bytes a slot")


if __name__ == "__main__":
    main()
