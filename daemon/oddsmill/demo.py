"""`oddsmill demo`: the learner's whole job on the parcel demo data, ending in a summary.

Streams the eight weeks of dispatches and delivery outcomes through the same engine the daemon
runs (each parcel scored at dispatch, learned when its outcome arrives), day by day, then shows how
the score quality moved week by week (the snow week stands out), how close the online model came
to the batch optimum on the same events, and the strongest effects as odds ratios.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from .demo_data import SNOW_DAYS, START, generate, to_jsonl_gz
from .engine import Engine
from .learner import Learner
from .offline import Progress, fit_logs, read_items
from .settings import LearnerSettings
from .storage import write_checkpoint

BUNDLED = Path(__file__).resolve().parents[2] / "replay_data" / "parcels.jsonl.gz"


def demo_log(workdir: Path) -> Path:
    """The bundled log when running from a checkout; else the same bytes, generated."""
    if BUNDLED.exists():
        return BUNDLED
    path = workdir / "parcels.jsonl.gz"
    path.write_bytes(to_jsonl_gz(generate()))
    return path


def run_demo(args: argparse.Namespace, out: Any = None) -> int:
    out = out or sys.stdout
    work = Path(tempfile.mkdtemp(prefix="oddsmill-demo-"))
    log = Path(args.data) if args.data else demo_log(work)
    settings = LearnerSettings()
    engine = Engine(Learner(settings))
    print(
        f"oddsmill demo: a parcel courier scores each dispatch for the chance it misses its "
        f"delivery window;\nthe outcome arrives hours later. Log: {log}",
        file=out,
    )
    bar = Progress(engine, "streaming")
    t0 = time.monotonic()
    weeks: dict[int, list[float]] = {}  # week -> [log-loss sum, count, sum of y]
    day_items: list[tuple[float, Any]] = []
    current_day = None

    def flush() -> None:
        if not day_items:
            return
        before_sum, before_n = engine.metrics.sum, engine.metrics.count
        engine.process(day_items)
        week = int(current_day or 0) // 7 + 1
        w = weeks.setdefault(week, [0.0, 0.0, 0.0])
        w[0] += engine.metrics.sum - before_sum
        w[1] += engine.metrics.count - before_n
        w[2] += sum(1 for _, it in day_items if getattr(it, "x", 1) is None and getattr(it, "y", 0) == 1)
        day_items.clear()
        bar(0)

    for arrival, item in read_items([str(log)]):
        ts = getattr(item, "ts", None) or arrival
        day = (ts - START) // 86400
        if current_day is not None and day != current_day:
            flush()
        current_day = day
        day_items.append((arrival, item))
    flush()
    bar.done()
    seconds = time.monotonic() - t0
    state = work / "state"
    ckpt = write_checkpoint(
        state,
        engine.learner.step,
        {
            "kind": "oddsmill-state",
            "created": time.time(),
            "engine": engine.state_dict(),
            "journal": None,
        },
    )
    res, _ = fit_logs([str(log)], settings)
    m = engine.metrics
    print(
        f"\nlearned {engine.learner.step:,} parcels ({engine.counters.score:,} dispatches scored) in {seconds:.1f} s",
        file=out,
    )
    print("\nweek  parcels delivered  late share  log-loss of the scores", file=out)
    snow_week = SNOW_DAYS[0] // 7 + 1
    for week, (s, n, late) in sorted(weeks.items()):
        if n:
            mark = (
                "  <- a week of snow: late deliveries jump, the scores lag"
                if week == snow_week
                else ("  (outcomes after the last dispatch day)" if week > max(weeks) - 1 and n < 1000 else "")
            )
            print(f"{week:>4}  {int(n):>17,}  {late / n:>10.1%}  {s / n:>10.4f}{mark}", file=out)
    print(
        f"\nprogressive log-loss (every parcel scored before its outcome was learned): {m.log_loss:.4f}",
        file=out,
    )
    print(
        f"last {min(m.count, m.window):,} parcels: log-loss {m.log_loss_window:.4f}, "
        f"Brier {m.brier_window:.4f}, calibration error {m.calibration_error_window:.4f}",
        file=out,
    )
    print(
        f"batch optimum on the same parcels (Newton fit, in-sample): log-loss {res.log_loss:.4f}",
        file=out,
    )
    c = engine.learner.coefficients()
    _, scale = engine.learner.scales()
    order = sorted(range(len(c.names)), key=lambda j: -abs(c.coefs[j] * scale[j]))[:6]
    print("\nstrongest effects (odds ratio per unit as sent):", file=out)
    import math

    for j in order:
        print(f"  {c.names[j]:<22} x{math.exp(c.coefs[j]):.3f}", file=out)
    print(f"\ncheckpoint: {ckpt}\nlook inside: oddsmill inspect {state}", file=out)
    return 0
