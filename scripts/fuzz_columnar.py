"""Random-mutation fuzzing of the compiled columnar reader (oddsmill.columnar) against the full path's
decoder, for longer than CI runs it (not part of CI; tests/test_columnar.py holds the same property
on 300 flipped bytes).

    PYTHONPATH=. python scripts/fuzz_columnar.py [SECONDS]      # default 60; from the repository's top

Blocks of one to five columnar messages of every shape the reader may take (names in two orders and
two widths, numbered or not, up to 700 rows), each message mutated or not: bytes flipped, cut short,
extended, a key renamed, a label or a value made bad. The property (tests.test_columnar.check): the
reader never crashes, and whatever it reads is exactly what msgpack's decoder and the protocol make
of each message, rows, labels and numbers. A failure prints the block and exits non-zero.
"""

from __future__ import annotations

import sys
import time

import msgpack
import numpy as np
from oddsmill.columnar import ColumnReader

from tests.test_columnar import NAMES, body, check

SHAPES = [NAMES, NAMES[::-1], ["route_km"]]


def message(rng: np.random.Generator) -> bytes:
    extra: dict[str, object] = {}
    if rng.random() < 0.5:
        extra = {"src": "depot-feed", "seq": int(rng.integers(0, 2**40))}
    names = SHAPES[int(rng.integers(len(SHAPES)))]
    raw = bytearray(msgpack.packb(body(int(rng.integers(1, 700)), names, int(rng.integers(1 << 30)), **extra)))
    kind = rng.random()
    if kind < 0.3:  # flip up to four bytes
        for _ in range(int(rng.integers(1, 5))):
            raw[int(rng.integers(len(raw)))] = int(rng.integers(256))
    elif kind < 0.4:  # cut short, or extended
        raw = raw[: int(rng.integers(len(raw)))] if rng.random() < 0.5 else raw + rng.bytes(int(rng.integers(1, 9)))
    elif kind < 0.5:  # a key renamed
        raw = bytearray(bytes(raw).replace(b"\xa1y", b"\xa1w", 1))
    elif kind < 0.6:  # a bad label, or a bad value
        if rng.random() < 0.5:
            raw[-1] = int(rng.choice([2, 255]))
        else:
            at = bytes(raw).index(b"\xa4rows") + 8
            raw[at + 7] = 0x7F if rng.random() < 0.5 else 0xFF  # an exponent of all ones: NaN or infinity
            raw[at + 6] |= 0xF0
    return bytes(raw)


def main() -> None:
    seconds = float(sys.argv[1]) if len(sys.argv) > 1 else 60.0
    rng = np.random.default_rng()
    reader = ColumnReader()
    end = time.monotonic() + seconds
    blocks = read = 0
    while time.monotonic() < end:
        block = [message(rng) for _ in range(int(rng.integers(1, 6)))]
        try:
            read += check(block, reader)
        except Exception:
            print("failed on the block:", [m.hex() for m in block], file=sys.stderr)
            raise
        blocks += 1
    print(f"{blocks:,} blocks, {read:,} read by the reader, the rest declined; no difference from the full path")


if __name__ == "__main__":
    main()
