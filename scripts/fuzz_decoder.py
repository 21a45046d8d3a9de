"""Coverage-guided fuzzing of the ingest decoder with atheris (not part of CI).

    pip install atheris
    python scripts/fuzz_decoder.py [SECONDS]      # default 300; stops cleanly when the time is up

Every input is fed to `unpack` then `decode_body`, then the decoded items to a fresh engine. The
property: nothing but the project's ProtocolError escapes, and a body the engine rejects leaves the
learner's state untouched. A failure prints the input and exits non-zero (atheris saves it as
crash-*). The corpus starts from valid bodies of every shape in PROTOCOL 2.
"""

from __future__ import annotations

import sys
import tempfile
import time
import types
from pathlib import Path

import atheris
import msgpack
from oddsmill import encoding, protocol
from oddsmill.engine import Engine, Rejection
from oddsmill.errors import ProtocolError
from oddsmill.learner import Learner

# Coverage is collected in the decoder only, and only in its Python functions: numba cannot compile
# instrumented bytecode, and the decoder has compiled parts (protocol._first_bad, the vocabulary's
# table), so each plain function of the two modules is replaced by an instrumented copy (their calls
# to one another go through the module, and reach the copies).
for module in (protocol, encoding):
    for name, value in list(vars(module).items()):
        if isinstance(value, types.FunctionType) and value.__module__ == module.__name__:
            setattr(module, name, atheris.instrument_func(value))
decode_body, unpack = protocol.decode_body, protocol.unpack

SEEDS = [
    {"x": {"route_km": 12.5, "depot": "Harbourside", "express": True}, "y": 1},
    {"id": "P1", "x": {"route_km": 3.0}},
    {"id": "P1", "y": 0},
    {"batch": [{"x": {"a": 1.0}, "y": 0}, {"id": 7, "x": {"b": "c"}, "w": 2.0, "y": 1}]},
    {"cols": ["a", "b"], "rows": b"\0" * 32, "y": b"\x01\xff", "src": "s", "seq": 3},
    {"x": {"a": 1.0}, "y": 1, "src": "depot-7", "seq": 0, "ts": 1.7e9},
]


def one_input(data: bytes) -> None:
    try:
        body = unpack(data)
    except ProtocolError:
        return
    engine = Engine(Learner())
    before = engine.learner.state_dict()
    items = decode_body(body)
    results = engine.process([(0.0, item) for item in items])
    if all(isinstance(r, Rejection) for _, r in results):
        after = engine.learner.state_dict()
        if after["slots"].tobytes() != before["slots"].tobytes() or after["name_bytes"] != before["name_bytes"]:
            raise AssertionError(f"a rejected body changed the model: {data!r}")


def main() -> None:
    seconds = int(sys.argv[1]) if len(sys.argv) > 1 and sys.argv[1].isdigit() else 300
    corpus = Path(tempfile.mkdtemp(prefix="oddsmill-fuzz-"))
    for k, seed in enumerate(SEEDS):
        (corpus / f"seed-{k}").write_bytes(msgpack.packb(seed))
    started = time.monotonic()
    print(f"fuzzing the decoder for {seconds} s; corpus {corpus}", file=sys.stderr)
    atheris.Setup([sys.argv[0], f"-max_total_time={seconds}", "-max_len=4096", str(corpus)], one_input)
    atheris.Fuzz()
    print(f"done after {time.monotonic() - started:.0f} s", file=sys.stderr)


if __name__ == "__main__":
    main()
