"""`oddsmill demo`: the whole job on the parcel demo data, through a live daemon, in one command.

Starts a daemon on free loopback ports with a fresh state directory, streams eight weeks of parcel
dispatches and their delivery outcomes through the client library day by day (waiting for each
day's scores before the next, so nothing is dropped), and ends with a summary: the weekly log-loss
of the scores the daemon published (the snow week stands out), the progressive and windowed figures
the daemon reports, the batch optimum on the same parcels, and the strongest effects.
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import sys
import tempfile
import threading
import time
import urllib.request
from pathlib import Path
from typing import Any

import zmq
from oddsmill_client import Producer, ScoreSubscriber

from .demo_data import SNOW_DAYS, START, generate, to_jsonl_gz
from .engine import Engine
from .errors import InputFileError
from .logs import read_bodies
from .offline import fit_logs
from .server import Server, ServerSettings
from .settings import LearnerSettings
from .storage import load_newest

BUNDLED = Path(__file__).resolve().parents[2] / "replay_data" / "parcels.jsonl.gz"
BATCH = 50  # events a message


def demo_log(workdir: Path) -> Path:
    """The bundled log when running from a checkout; else the same bytes, generated."""
    if BUNDLED.exists():
        return BUNDLED
    path = workdir / "parcels.jsonl.gz"
    path.write_bytes(to_jsonl_gz(generate()))
    return path


def _days(log: Path) -> list[list[dict[str, Any]]]:
    """The log's events by the day of their ts. The demo takes logs of its own shape (as
    `python -m oddsmill.demo_data` writes them): a line is a dispatch {"id", "x", "ts"} or the outcome
    {"id", "y", "ts"} of a dispatch before it. Anything else is an InputFileError naming its line,
    before the daemon starts."""
    days: dict[int, list[dict[str, Any]]] = {}
    dispatched: set[str | int] = set()
    for _, body, where in read_bodies([str(log)]):
        ts: Any = body.get("ts") if isinstance(body, dict) else None
        ident: Any = body.get("id") if isinstance(body, dict) else None
        timed = type(ts) in (int, float) and math.isfinite(ts) and type(ident) in (str, int)
        if timed and "x" in body:
            dispatched.add(ident)
        elif not (timed and "y" in body and ident in dispatched):
            raise InputFileError(
                where, None, "not a line of the demo's log: a dispatch {id, x, ts}, or the outcome {id, y, ts} of one"
            )
        days.setdefault(int((ts - START) // 86400), []).append(body)
    if not days:
        raise InputFileError(str(log), None, "no events")
    return [days[d] for d in sorted(days)]


def run_demo(args: argparse.Namespace, out: Any = None) -> int:
    out = out or sys.stdout
    work = Path(tempfile.mkdtemp(prefix="oddsmill-demo-"))
    log = Path(args.data) if args.data else demo_log(work)
    try:
        days = _days(log)
    except InputFileError:
        shutil.rmtree(work, ignore_errors=True)
        raise
    state = work / "state"
    settings = LearnerSettings()
    server = Server(
        ServerSettings(state_dir=state, ingest="tcp://127.0.0.1:*", scores="tcp://127.0.0.1:*", http="127.0.0.1:0"),
        settings,
    )
    stop = threading.Event()
    ctx: zmq.Context[Any] = zmq.Context()
    thread = threading.Thread(target=server.serve, args=(stop, ctx), name="oddsmill-daemon", daemon=True)
    thread.start()
    if not server.ready.wait(30):
        print("oddsmill demo: the daemon did not start", file=sys.stderr)
        return 1
    http = f"http://{server.bound['http']}"
    print(
        f"oddsmill demo: a parcel courier scores each dispatch for the chance it misses its delivery\n"
        f"window; the outcome arrives hours later. Daemon: ingest {server.bound['ingest']}, scores "
        f"{server.bound['scores']}\ndashboard: {http}/   figures: {http}/api/status   metrics: {http}/metrics",
        file=out,
    )
    tty = bool(getattr(sys.stderr, "isatty", lambda: False)())
    published: dict[Any, float] = {}  # id -> p, as the daemon published it
    weeks: dict[int, list[float]] = {}  # week -> [log-loss sum, parcels, late]
    t0 = time.monotonic()
    with (
        ScoreSubscriber(server.bound["scores"], topics=("scores",), context=ctx) as scores,
        Producer(server.bound["ingest"], src="demo", batch=BATCH, context=ctx) as producer,
    ):
        scores.await_daemon(producer)
        for day, bodies in enumerate(days):
            want = len(published) + sum(1 for b in bodies if "x" in b)
            for body in bodies:
                producer.send(body)
            producer.flush()
            while len(published) < want:
                _, answer = scores.receive(timeout=30)
                for s in answer.get("batch", [answer]):
                    if s.get("id") is not None:
                        published[s["id"]] = s["p"]
            # each outcome against the score the daemon published for its dispatch
            for body in bodies:
                if "y" in body and "x" not in body:
                    p, y = published[body["id"]], body["y"]
                    w = weeks.setdefault(day // 7 + 1, [0.0, 0.0, 0.0])
                    w[0] -= math.log(p if y else 1.0 - p)
                    w[1] += 1
                    w[2] += y
            if tty:
                done = sum(w[1] for w in weeks.values())
                rate = (len(published) + done) / (time.monotonic() - t0)
                ll = sum(w[0] for w in weeks.values()) / max(done, 1)
                sys.stderr.write(
                    f"\rday {day + 1}  {len(published):,} parcels scored  {rate:,.0f} events/s  log-loss {ll:.4f}   "
                )
                sys.stderr.flush()
    if tty:
        sys.stderr.write("\n")
    seconds = time.monotonic() - t0
    status = _status(http, server)
    if not args.keep_running:
        stop.set()
        thread.join(30)
    found = load_newest(state)
    engine = Engine.from_state_dict(found[0]["engine"]) if found else server.engine
    res, _ = fit_logs([str(log)], settings)
    print(f"\nstreamed {len(published):,} dispatches and their outcomes in {seconds:.1f} s", file=out)
    print("\nweek  parcels delivered  late share  log-loss of the published scores", file=out)
    snow_week = SNOW_DAYS[0] // 7 + 1
    for week, (s, n, late) in sorted(weeks.items()):
        mark = "  <- a week of snow: late deliveries jump, the scores lag" if week == snow_week else ""
        if week == max(weeks) and week > snow_week + 2:
            mark = "  (the last outcomes, delivered after the final dispatch day)"
        print(f"{week:>4}  {int(n):>17,}  {late / n:>10.1%}  {s / n:>10.4f}{mark}", file=out)
    print(
        f"\nprogressive log-loss (every parcel scored before its outcome was learned): {status['log_loss']:.4f}",
        file=out,
    )
    print(
        f"last {min(int(status['log_loss_count']), 10_000):,} parcels: log-loss {status['log_loss_window']:.4f}, "
        f"Brier {status['brier_window']:.4f}, calibration error {status['calibration_error_window']:.4f}",
        file=out,
    )
    print(f"batch optimum on the same parcels (Newton fit, in-sample): log-loss {res.log_loss:.4f}", file=out)
    c = engine.learner.coefficients()
    _, scale = engine.learner.scales()
    order = sorted(range(len(c.names)), key=lambda j: -abs(c.coefs[j] * scale[j]))[:6]
    print("\nstrongest effects (odds ratio per unit as sent):", file=out)
    for j in order:
        print(f"  {c.names[j]:<22} x{math.exp(c.coefs[j]):.3f}", file=out)
    print(f"\nstate: {state}\nlook inside: oddsmill inspect {state}", file=out)
    if args.keep_running:
        print(f"the daemon keeps running ({http}/api/status); Ctrl-C stops it", file=out)
        try:
            while thread.is_alive():
                thread.join(0.5)
        except KeyboardInterrupt:
            stop.set()
            thread.join(30)
    ctx.term()
    return 0


def _status(http: str, server: Server) -> dict[str, Any]:
    """The daemon's figures once it has caught up with every learned event."""
    deadline = time.monotonic() + 10
    while True:
        doc: dict[str, Any] = json.loads(urllib.request.urlopen(f"{http}/api/status", timeout=5).read())
        if doc["step"] == server.engine.learner.step or time.monotonic() > deadline:
            return doc
        time.sleep(0.05)
