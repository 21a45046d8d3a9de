"""The demo data: an invented regional parcel courier, drawn from a known logistic model.

Each parcel is scored at dispatch for the probability that it misses its promised delivery window;
its outcome arrives when it is delivered, two to ten hours later. The log holds dispatches (scoring
requests with ids) and outcomes, interleaved in time order. Eight weeks from Monday 2 March 2026;
week six brings snow, which raises the late rate by more than the weather feature explains (a
drift the model has to absorb).

    python -m oddsmill.demo_data replay_data/parcels.jsonl.gz

writes the committed file; the tests regenerate it and check it is byte-identical.
"""

from __future__ import annotations

import gzip
import io
import json
import math
import sys

import numpy as np

SEED = 20260302
START = 1772409600.0  # 2026-03-02T00:00:00Z, a Monday
DAYS = 56
PARCELS_PER_DAY = 500
SNOW_DAYS = range(35, 42)  # week six
DEPOTS = ("Harbourside", "Millbrook", "Eastgate", "Fenwick Yard", "Quarry Lane")
WEEKDAYS = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")

# The generating model: logit of a late delivery (raw units).
TRUE_INTERCEPT = -4.6
TRUE = {
    "route_km": 0.018,
    "stops_before": 0.045,
    "weight_kg": 0.03,
    "dispatch_hour": 0.06,
    "courier_open_tasks": 0.05,
    "depot=Millbrook": 0.25,
    "depot=Eastgate": -0.20,
    "depot=Fenwick Yard": 0.45,
    "depot=Quarry Lane": 0.10,
    "express": 0.35,
    "same_day": 0.80,
    "weather=rain": 0.40,
    "weather=wind": 0.20,
    "weather=snow": 0.70,
    "weekend": 0.25,
}
SNOW_SHIFT = 0.9  # the part of the snow week the features do not carry


def generate() -> list[dict[str, object]]:
    """The demo log: bodies in time order."""
    rng = np.random.default_rng(SEED)
    out: list[tuple[float, int, dict[str, object]]] = []
    n = 0
    for day in range(DAYS):
        snow = day in SNOW_DAYS
        weekday = WEEKDAYS[day % 7]
        weather_p = (0.05, 0.05, 0.05, 0.85) if snow else (0.62, 0.25, 0.13, 0.0)
        for _ in range(PARCELS_PER_DAY):
            n += 1
            hour = int(rng.integers(7, 21))
            ts = START + day * 86400 + hour * 3600 + float(rng.uniform(0, 3600))
            depot = int(rng.choice(6, p=(0.35, 0.2, 0.15, 0.12, 0.1, 0.08)))
            service = int(rng.choice(3, p=(0.7, 0.2, 0.1)))
            weather = int(rng.choice(4, p=weather_p))
            x: dict[str, object] = {
                "route_km": round(float(rng.gamma(3.0, 14.0)), 1),
                "stops_before": int(rng.poisson(11)),
                # nil when the parcel leaves the central hub itself
                "depot": None if depot == 0 else DEPOTS[depot - 1],
                "express": service == 1,
                "same_day": service == 2,
                # nil when there is no weather warning
                "weather": (None, "rain", "wind", "snow")[weather],
                "dispatch_hour": hour,
                "weekend": weekday in ("sat", "sun"),
                "weight_kg": round(float(rng.lognormal(0.8, 0.9)), 2),
                "courier_open_tasks": int(rng.poisson(6)),
            }
            z = TRUE_INTERCEPT + (SNOW_SHIFT if snow else 0.0)
            for k, v in x.items():
                if v is None:
                    continue
                if isinstance(v, str):
                    z += TRUE.get(f"{k}={v}", 0.0)
                elif isinstance(v, int | float):
                    z += TRUE.get(k, 0.0) * float(v)
            late = int(rng.random() < 1.0 / (1.0 + math.exp(-z)))
            ident = f"P{n:06d}"
            delivered = ts + float(rng.uniform(2, 10)) * 3600
            out.append((ts, 0, {"id": ident, "x": x, "ts": round(ts, 3)}))
            out.append((delivered, 1, {"id": ident, "y": late, "ts": round(delivered, 3)}))
    out.sort(key=lambda r: (r[0], r[1]))
    return [body for _, _, body in out]


def to_jsonl_gz(bodies: list[dict[str, object]]) -> bytes:
    """Deterministic bytes: compact JSON, gzip with no name and mtime 0."""
    buf = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=buf, mtime=0, compresslevel=9) as gz:
        for body in bodies:
            gz.write(json.dumps(body, separators=(",", ":")).encode() + b"\n")
    return buf.getvalue()


def main(argv: list[str] | None = None) -> int:
    import argparse

    ap = argparse.ArgumentParser(prog="python -m oddsmill.demo_data", description="write the demo log")
    ap.add_argument("out", nargs="?", default="replay_data/parcels.jsonl.gz", help="where (.jsonl.gz)")
    args = ap.parse_args(argv)
    try:
        with open(args.out, "wb") as f:
            f.write(to_jsonl_gz(generate()))
    except OSError as e:
        print(f"{ap.prog}: cannot write {args.out} ({e.strerror})", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
