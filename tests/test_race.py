"""The race of candidates (race.py) on invented streams: each candidate equals a single-learner run
bit for bit, the serving one ends near the best in hindsight on a stationary stream, and after an
abrupt change the race moves to a faster-adapting candidate."""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from oddsmill.engine import Engine, Score, each_score
from oddsmill.errors import ConfigError
from oddsmill.learner import Learner
from oddsmill.progressive import sigmoid
from oddsmill.protocol import decode_body
from oddsmill.race import Candidate, Race, auto_candidates
from oddsmill.settings import LearnerSettings

from tests.conftest import sparse_stream
from tests.tools import names_in


def drifting(n: int, change: int, seed: int) -> list[dict[str, Any]]:
    """Invented parcels whose lateness depends on distance and depot, until event `change`, when
    the signs flip (a new routing system, say)."""
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        km, depot = float(rng.gamma(3, 14)), str(rng.choice(["Harbourside", "Millbrook", "Eastgate"]))
        sign = 1.0 if i < change else -1.0
        z = sign * (0.04 * (km - 40) + (1.0 if depot == "Millbrook" else -0.5))
        out.append({"x": {"route_km": km, "depot": depot}, "y": int(rng.random() < sigmoid(np.array(z)))})
    return out


def blocks(bodies: list[dict[str, Any]], size: int) -> list[list[tuple[float, Any]]]:
    items = [(0.0, it) for b in bodies for it in decode_body(b)]
    return [items[lo : lo + size] for lo in range(0, len(items), size)]


SPEEDS = [
    Candidate("steady", LearnerSettings(schedule="power", eta0=0.5, scale_warmup=200)),
    Candidate("quick", LearnerSettings(schedule="constant", eta0=0.05, average=False, scale_warmup=200)),
    Candidate("sluggish", LearnerSettings(schedule="power", eta0=0.02, scale_warmup=200)),
]


def test_each_candidate_equals_a_single_learner_run_and_switching_changes_none() -> None:
    bodies = drifting(12_000, change=6_000, seed=1)
    race = Race(SPEEDS, window=1000, patience=500)
    alone = [Engine(Learner(c.settings), 1000) for c in SPEEDS]
    for block in blocks(bodies, 257):
        served = race.process(block)
        assert len(served) == len(block)  # one answer an item: never two candidates' scores for one event
        assert all(isinstance(r, Score) for _, r in served)
        for e in alone:
            e.process(block)
    assert race.switches, "the change should have moved the race"
    for mine, theirs in zip(race.engines, alone, strict=True):
        a, b = mine.learner.state_dict(), theirs.learner.state_dict()
        assert a["scalars"].tobytes() == b["scalars"].tobytes()
        assert a["slots"].tobytes() == b["slots"].tobytes()
        assert mine.metrics.sum == theirs.metrics.sum


def mixed(n: int, seed: int) -> list[tuple[float, dict[str, Any]]]:
    """(arrival, body) of every kind: training events, scoring requests held by id and their
    outcomes (some late, some for ids never held), columnar blocks (learned whole, and with held
    rows), a repeated sequence number and a bad event, with arrival times that let requests expire."""
    rnd = np.random.default_rng(seed)
    stream = sparse_stream(n, seed)
    out: list[tuple[float, dict[str, Any]]] = []
    waiting: list[tuple[str, int]] = []
    last_seq = 0
    for i, (x, y) in enumerate(stream):
        t = float(i + (1000 if i >= n // 2 else 0))  # a quiet hour halfway: what is held expires
        kind = i % 10
        if kind < 5:
            out.append((t, {"x": x, "y": y, "src": "depot-a", "seq": i}))
            last_seq = i
        elif kind < 8:
            out.append((t, {"id": f"P{i}", "x": x}))
            waiting.append((f"P{i}", y))
        elif kind == 8 and waiting:
            k = int(rnd.integers(len(waiting)))
            ident, label = waiting.pop(k)
            out.append((t, {"id": ident, "y": label}))
            out.append((t, {"id": f"never-{i}", "y": 1}))
        else:
            rows = rnd.normal(size=(6, 2)) * [30.0, 5.0]
            cols: dict[str, Any] = {"cols": ["route_km", "stops_before"], "rows": rows.astype("<f8").tobytes()}
            labels = (rnd.random(6) < 0.4).astype(np.uint8)
            if i % 20 == 9:  # rows held by id: learned row by row
                labels[::2] = 255
                cols["id"] = [f"C{i}-{r}" for r in range(6)]
            cols["y"] = labels.tobytes()
            out.append((t, cols))
            out.append((t, {"x": {"route_km": float("nan")}, "y": 1}))
            out.append((t, {"x": x, "y": y, "src": "depot-a", "seq": last_seq}))  # a duplicate
    return out


def test_candidates_sharing_one_encoding_equal_engines_of_their_own() -> None:
    """The race prepares each block once (one vocabulary, counters, sequence checks) and mirrors
    the pending store into every candidate; each must end exactly where an engine of its own on
    the same blocks ends: weights, metrics, held requests with the scores published for them."""
    stream = mixed(6_000, seed=5)
    race = Race(SPEEDS, window=500, pending_limit=100, pending_ttl=400.0, patience=200)
    alone = [Engine(Learner(c.settings), 500, 100, 400.0) for c in SPEEDS]
    served, expected = [], []
    for lo in range(0, len(stream), 97):
        block = [(t, it) for t, body in stream[lo : lo + 97] for it in decode_body(body)]
        serving = race.serving
        served.extend((r.id, r.logit, r.step) for r in each_score(race.process(block)))
        for k, e in enumerate(alone):
            got = e.process(block)
            if k == serving:
                expected.extend((r.id, r.logit, r.step) for r in each_score(got))
    assert served == expected
    c = race.engine.counters
    assert c.pending_expired > 0 and c.pending_evicted > 0 and c.outcome > 0
    assert c.rejected["unknown_outcome"] > 0 and c.rejected["duplicate"] > 0 and c.rejected["non_finite"] > 0
    for mine, theirs in zip(race.engines, alone, strict=True):
        a, b = mine.state_dict(), theirs.state_dict()
        for key in ("scalars", "slots", "flags", "centred_list", "warmup_queue"):
            assert a["learner"][key].tobytes() == b["learner"][key].tobytes(), key
        assert names_in(a["learner"]) == names_in(b["learner"])
        assert a["pending"] == b["pending"]  # the same ids in the same order, each with its own score
        assert a["counters"] == b["counters"] and a["last_seq"] == b["last_seq"]
        assert mine.metrics.sum == theirs.metrics.sum and mine.metrics.count == theirs.metrics.count
    # the candidates' held scores differ: each holds the score it published itself
    logits = [[e[4] for e in eng.state_dict()["pending"]] for eng in race.engines]
    assert logits[0] != logits[1]


@pytest.mark.parametrize("threads", [1, 3])
def test_the_kernels_threads_change_nothing(threads: int) -> None:
    """The candidates' kernels run on `threads` threads; each candidate is still learned in order,
    so the race ends bit for bit where the same race on the default number of threads ends."""
    stream = mixed(3_000, seed=8)
    races = [Race(SPEEDS, window=500, pending_limit=100, pending_ttl=400.0, patience=200) for _ in range(2)]
    races[1].threads = threads
    served: list[list[tuple[Any, float]]] = [[], []]
    for lo in range(0, len(stream), 211):
        block = [(t, it) for t, body in stream[lo : lo + 211] for it in decode_body(body)]
        for k, race in enumerate(races):
            served[k].extend((r.id, r.logit) for r in each_score(race.process(block)))
    assert served[0] == served[1]
    for a, b in zip(races[0].engines, races[1].engines, strict=True):
        assert a.learner.state_dict()["slots"].tobytes() == b.learner.state_dict()["slots"].tobytes()
        assert a.metrics.sum == b.metrics.sum


def test_candidates_must_share_the_vocabulary_cap() -> None:
    with pytest.raises(ConfigError, match="one max_features"):
        Race([Candidate("a", LearnerSettings()), Candidate("b", LearnerSettings(max_features=10))])


def test_a_restored_race_continues_exactly(tmp_path: Path) -> None:
    bodies = drifting(6_000, change=3_000, seed=2)
    parts = blocks(bodies, 300)
    whole = Race(SPEEDS, window=1000, patience=500)
    halves = Race(SPEEDS, window=1000, patience=500)
    for k, block in enumerate(parts):
        whole.process(block)
        if k == len(parts) // 2:
            from oddsmill.storage import decode_checkpoint, encode_checkpoint

            halves = Race.from_state_dict(decode_checkpoint(encode_checkpoint(halves.state_dict())))
        halves.process(block)
    assert whole.serving == halves.serving and whole.switches == halves.switches
    for a, b in zip(whole.engines, halves.engines, strict=True):
        assert a.learner.state_dict()["slots"].tobytes() == b.learner.state_dict()["slots"].tobytes()


def test_on_a_stationary_stream_the_serving_candidate_ends_near_the_best() -> None:
    bodies = [{"x": x, "y": y} for x, y in sparse_stream(30_000, seed=3)]
    race = Race(auto_candidates(LearnerSettings(scale_warmup=200)), window=5000)
    for block in blocks(bodies, 500):
        race.process(block)
    windows = [e.metrics.log_loss_window for e in race.engines]
    best = min(windows)
    serving = windows[race.serving]
    print(f"serving {race.names[race.serving]} {serving:.5f}; best {race.names[windows.index(best)]} {best:.5f}")
    assert serving <= best * 1.02


def test_after_an_abrupt_change_the_race_moves_to_a_quicker_candidate() -> None:
    change = 8_000
    bodies = drifting(20_000, change=change, seed=4)
    race = Race(SPEEDS, window=1000, patience=500)
    served_window: list[tuple[int, float, float]] = []  # (labelled, serving's window, sluggish's window)
    for block in blocks(bodies, 100):
        race.process(block)
        m = race.engine.metrics
        served_window.append((m.count, m.log_loss_window, race.engines[2].metrics.log_loss_window))
    after = [s for s in race.switches if s["at"] > change]
    assert after, f"no switch after the change: {race.switches}"
    first = after[0]
    print(
        f"change at {change:,}; switch at {first['at']:,} to {first['to']} "
        f"(recent log-loss {first['to_log_loss_window']:.4f} against {first['from_log_loss_window']:.4f})"
    )
    assert first["to"] == "quick"
    assert first["at"] - change <= 3000, "the race took too long to move"
    # the served window recovers sooner than the sluggish candidate's
    recovered = {
        k: next(c for c, s, g in served_window if c > change and (s if k == "served" else g) < 0.6)
        for k in ("served", "sluggish")
        if any(c > change and (s if k == "served" else g) < 0.6 for c, s, g in served_window)
    }
    print(f"recent log-loss back under 0.6 at: {recovered}")
    assert recovered["served"] < recovered.get("sluggish", math.inf)


def test_a_racing_daemon_publishes_the_serving_candidate_and_shows_the_race(tmp_path: Path) -> None:
    import urllib.request

    from oddsmill.server import Server

    from tests.conftest import Client, RunningServer, loopback
    from tests.test_dashboard import Page, counts_apart
    from tests.tools import chromium

    settings = loopback(tmp_path, http="127.0.0.1:0", candidates=tuple(SPEEDS), race_patience=500, window=1000)
    running = RunningServer(settings, LearnerSettings())
    server = running.server
    client = Client(running.ctx, server.bound["ingest"], server.bound["scores"])
    bodies = drifting(6_000, change=3_000, seed=5)
    published: list[float] = []
    for lo in range(0, len(bodies), 200):
        client.send({"batch": bodies[lo : lo + 200]})
        published.extend(s["logit"] for s in client.receive(1)[0][1]["batch"])
    assert server.race is not None and server.race.switches
    http = server.bound["http"]
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:  # (a scrape's figures are taken after it asked)
        with urllib.request.urlopen(f"http://{http}/metrics", timeout=5) as r:
            exposition = r.read().decode()
        if f"oddsmill_candidate_switches_total {len(server.race.switches)}.0" in exposition:
            break
        time.sleep(0.05)
    serving = [line for line in exposition.splitlines() if line.startswith("oddsmill_candidate_serving{")]
    assert len(serving) == 3 and sum(float(line.split()[-1]) for line in serving) == 1.0
    assert f'oddsmill_candidate_serving{{candidate="{server.race.names[server.race.serving]}"}} 1.0' in exposition
    page = Page()
    page.feed(chromium(f"http://{http}/", "--dump-dom", user_data=tmp_path / "profile"))
    assert {name for name in page.series if name.startswith(("steady", "quick", "sluggish"))} == {
        "steady",
        "quick",
        "sluggish",
    } - {server.race.names[server.race.serving]} | {server.race.names[server.race.serving] + " (serving)"}
    # the strongest features are the serving candidate's (they showed none within the first two
    # seconds: the ranking of the start, with no features, was kept)
    serving_names = {c["feature"] for c in server.race.engine.learner.top_coefficients(12)[1]}
    assert serving_names and {b["data-feature"] for b in page.bars} == serving_names
    # a calibrated model's circles lie on the diagonal: its key and the counts cross none of them
    with urllib.request.urlopen(f"http://{http}/api/status", timeout=5) as r:
        bins = json.loads(r.read())["calibration_bins"]
    counts_apart(page, [b["count"] for b in bins if b["count"]])
    from tests.tools import ARTIFACTS

    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shot = f"--screenshot={ARTIFACTS / 'dashboard-race.png'}"
    chromium(f"http://{http}/", "--window-size=1300,1600", shot, user_data=tmp_path / "p2")
    client.close()
    running.close()
    # the published scores are, event by event, those of the candidate serving at the time: replayed
    # offline in the same blocks, the race publishes the same
    offline = Race(SPEEDS, window=1000, patience=500)
    again: list[float] = []
    for lo in range(0, len(bodies), 200):
        items = [(0.0, it) for it in decode_body({"batch": bodies[lo : lo + 200]})]
        again.extend(r.logit for _, r in offline.process(items) if isinstance(r, Score))
    assert again == published[-len(again) :]
    # a restart resumes every candidate and the serving choice
    resumed = Server(loopback(tmp_path, candidates=tuple(SPEEDS), race_patience=500, window=1000), LearnerSettings())
    resumed.journal.close()
    assert resumed.race is not None and resumed.race.serving == server.race.serving
    for a, b in zip(resumed.race.engines, server.race.engines, strict=True):
        assert a.learner.state_dict()["slots"].tobytes() == b.learner.state_dict()["slots"].tobytes()


def test_inspect_shows_a_race_in_its_checkpoint(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """`inspect` of a racing daemon's state: each candidate's figures, the serving one marked, and
    how many switches ("1 switches" before)."""
    import msgpack
    import zmq
    from oddsmill.cli import main
    from oddsmill.server import Server, ServerSettings

    server = Server(
        ServerSettings(state_dir=tmp_path / "s", http="off", candidates=tuple(SPEEDS), race_patience=500, window=1000),
        LearnerSettings(),
    )
    ctx: zmq.Context[Any] = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind(f"inproc://inspect-race-{id(server)}")
    bodies = drifting(6_000, change=3_000, seed=5)
    for lo in range(0, len(bodies), 200):
        server.handle([[b"events", msgpack.packb({"batch": bodies[lo : lo + 200]})]], pub)
    assert server.race is not None and len(server.race.switches) == 1
    assert server.checkpoint() is not None
    server.close()
    pub.close(0)
    ctx.term()
    assert main(["inspect", str(tmp_path / "s")]) == 0
    out = capsys.readouterr().out.splitlines()
    assert "race of 3 candidates (1 switch); the model below serves" in out
    serving = [line.split()[0] for line in out if line.endswith("<- serves")]
    assert serving == [server.race.names[server.race.serving]]
