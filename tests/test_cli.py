"""The command line: JSON shapes of PROTOCOL 7, exit codes, messages naming file and line."""

from __future__ import annotations

import io
import json
from contextlib import redirect_stdout
from pathlib import Path

import numpy as np
import pytest
from oddsmill.cli import main

from tests.conftest import DEMO


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def test_replay_then_inspect_json_has_the_protocol_shape(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    code, out, _ = run(["replay", str(DEMO), "--state", str(tmp_path / "s")], capsys)
    assert code == 0 and "checkpoint" in out
    code, out, _ = run(["inspect", str(tmp_path / "s"), "--json", "--top", "3"], capsys)
    assert code == 0
    doc = json.loads(out)
    assert doc["step"] == 28_000
    assert set(doc) >= {"step", "learner", "intercept", "coefficients", "metrics"}
    assert set(doc["intercept"]) == {"coef"}
    assert len(doc["coefficients"]) == 3
    for row in doc["coefficients"]:
        assert set(row) == {"feature", "coef", "odds_ratio"}
        assert row["odds_ratio"] == pytest.approx(np.exp(row["coef"]))
    assert doc["learner"]["schedule"] == "power"
    assert doc["metrics"]["log_loss_count"] == 28_000
    code, out, _ = run(["inspect", str(tmp_path / "s")], capsys)
    assert code == 0 and "odds ratio" in out


def test_inspect_gives_when_the_checkpoint_was_written_in_utc(
    tmp_path: Path, capsys, monkeypatch: pytest.MonkeyPatch
) -> None:  # type: ignore[no-untyped-def]
    """inspect gave the checkpoint's time in the machine's zone without naming it (a report gives
    it in UTC); it says UTC now, whatever the zone."""
    import datetime
    import time

    from oddsmill.cli import load_state

    assert run(["replay", str(DEMO), "--state", str(tmp_path / "s")], capsys)[0] == 0
    created = load_state(str(tmp_path / "s"))[1]
    monkeypatch.setenv("TZ", "America/Santiago")
    time.tzset()
    try:
        code, out, err = run(["inspect", str(tmp_path / "s")], capsys)
    finally:
        monkeypatch.delenv("TZ")
        time.tzset()
    assert code == 0, err
    when = datetime.datetime.fromtimestamp(created, datetime.UTC).strftime("%Y-%m-%d %H:%M:%S")
    assert f"checkpoint written {when} UTC" in out.splitlines()


def test_fit_json_shape_and_against(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    run(["replay", str(DEMO), "--state", str(tmp_path / "s"), "--epochs", "3"], capsys)
    _, out, _ = run(["inspect", str(tmp_path / "s"), "--json"], capsys)
    state = json.loads(out)  # three epochs learned: every event three times, scored (progressively) once
    assert state["step"] == 3 * 28_000 and state["metrics"]["log_loss_count"] == 28_000
    code, out, _ = run(["fit", str(DEMO), "--json", "--against", str(tmp_path / "s")], capsys)
    assert code == 0
    doc = json.loads(out)
    assert doc["n"] == 28_000 and doc["converged"] is True and doc["iterations"] > 1
    assert doc["warnings"] == []  # the demo's parcels leave nothing to the penalty
    assert set(doc["intercept"]) == {"coef", "se", "z", "p_value", "ci95"}
    for row in doc["coefficients"]:
        assert set(row) == {"feature", "coef", "se", "z", "p_value", "ci95", "odds_ratio"}
        lo, hi = row["ci95"]
        assert lo < row["coef"] < hi
    assert 0 < doc["against"]["relative_coef_error"] < 1
    assert doc["against"]["log_loss"] >= doc["log_loss"] - 1e-12  # nothing beats the optimum
    code, out, _ = run(["fit", str(DEMO)], capsys)
    assert code == 0 and "std err" in out and "95% interval" in out


def test_bad_input_names_file_and_line_and_exits_2(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    log = tmp_path / "bad.jsonl"
    log.write_text('{"x": {"route_km": 1.5}, "y": 1}\n{"x": {"route_km": 2}, "y": 3}\n')
    code, _, err = run(["replay", str(log), "--state", str(tmp_path / "s")], capsys)
    assert code == 2
    assert f"{log}:2" in err and "bad_label" in err
    assert not (tmp_path / "s").exists()  # nothing written
    log.write_text('{"x": {"route_km": 1.5}, "y": 1}\n{not json\n')
    code, _, err = run(["fit", str(log)], capsys)
    assert code == 2 and f"{log}:2" in err and "not JSON" in err


def test_a_feature_the_learner_refuses_stops_a_file_at_its_line(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A value out of the learner's range, a NaN (JSON Lines as Python writes them) or two features
    of one name are refused by the encoding, after decoding: a file stops there too, naming the line
    (before, `replay` counted them as rejected and `fit` dropped them without a word)."""
    bad = [
        '{"x": {"route_km": 1e40}, "y": 0}',
        '{"x": {"route_km": NaN}, "y": 0}',
        '{"x": {"depot": "a=b", "depot=a": "b"}, "y": 0}',
    ]
    for line in bad:
        log = tmp_path / "bad.jsonl"
        log.write_text('{"x": {"route_km": 1.5}, "y": 1}\n{"x": {"route_km": 2.5}, "y": 0}\n' + line + "\n")
        for argv in (["replay", str(log), "--state", str(tmp_path / "s")], ["fit", str(log)]):
            code, _, err = run(argv, capsys)
            assert code == 2 and f"{log}:3" in err, (argv, line, err)
            assert ("bad_features" in err or "non_finite" in err) and len(err.strip().splitlines()) == 1
        assert not (tmp_path / "s").exists()  # nothing written


def test_a_daemon_journal_with_refused_messages_replays_and_counts_them(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A journal holds what a daemon received, the messages it refused included: replaying it (or
    warming up from it) counts them again, as the daemon did, and learns the rest."""
    from tests.conftest import handled_once

    bodies = [
        {"x": {"route_km": 1.0}, "y": 1},
        {"x": {"route_km": 2.0}, "y": 7},  # bad_label (decoding)
        {"x": {"route_km": 1e40}, "y": 0},  # bad_features (encoding)
        {"id": "P-9", "y": 1},  # unknown_outcome (the stream)
        {"x": {"route_km": 3.0}, "y": 0},
    ]
    server = handled_once(tmp_path / "live", bodies)
    live = server.engine.counters.rejected
    assert live == {"bad_label": 1, "bad_features": 1, "unknown_outcome": 1}
    code, out, err = run(["replay", str(tmp_path / "live"), "--state", str(tmp_path / "s")], capsys)
    assert code == 0, err
    assert "rejected 3: bad_features 1, bad_label 1, unknown_outcome 1" in out
    code, out, _ = run(["inspect", str(tmp_path / "s"), "--json"], capsys)
    assert json.loads(out)["step"] == server.engine.learner.step == 2


def test_replay_refuses_a_directory_that_holds_a_state_and_changes_nothing(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """`replay LOG --state DIR` on a directory a daemon had served wrote its checkpoint beside the
    daemon's, and the next `serve` resumed from it and learned the daemon's whole journal again on
    top: the demo's 28,000 events became 84,000 after a replay of two epochs (run by hand). Beside
    a checkpoint of a later step it would be passed over, saying nothing. A replay now refuses a
    directory with a checkpoint or a journal segment (exit 2), and leaves its files as they were."""
    from oddsmill.server import Server, ServerSettings

    from tests.conftest import handled_once

    served = tmp_path / "served"
    handled_once(served, [{"x": {"route_km": float(k)}, "y": k % 2} for k in range(40)])
    replayed = tmp_path / "replayed"
    assert run(["replay", str(DEMO), "--state", str(replayed)], capsys)[0] == 0
    for state, held in (
        (served, "a journal of 1 segment"),
        (replayed, "checkpoint-000000028000.omc"),
    ):
        before = {p.name: p.stat().st_mtime_ns for p in state.iterdir() if p.name != "lock"}
        for extra in ([], ["--candidates", "auto"]):
            code, out, err = run(["replay", str(DEMO), "--state", str(state), "--epochs", "1", *extra], capsys)
            assert code == 2 and out == ""
            assert err.strip() == (
                f"oddsmill: {state} holds a state already ({held}): replay begins a new one. Give a new or "
                "empty directory (to learn a state's journal again with other settings: replay DIR --state "
                "NEW-DIR), or send the logs to the daemon that serves it"
            )
            assert {p.name: p.stat().st_mtime_ns for p in state.iterdir() if p.name != "lock"} == before
    # the served state resumes as it was: its 40 events, learned once (and the directory is free)
    server = Server(ServerSettings(state_dir=served, http="off"))
    try:
        assert server.engine.learner.step == 40
    finally:
        server.close()
    # a directory that exists but holds no state (made by hand, or a lock left) is taken
    (tmp_path / "empty").mkdir()
    assert run(["replay", str(DEMO), "--state", str(tmp_path / "empty")], capsys)[0] == 0


@pytest.mark.parametrize(
    "argv,needle",
    [
        (["replay", "nowhere.jsonl", "--state", "x"], "no such file"),
        (["replay", "x.jsonl", "--state", "s", "--l2", "-1"], "l2 must be >= 0, got -1"),
        (["replay", "x.jsonl", "--state", "s", "--epochs", "0"], "--epochs must be >= 1"),
        (["inspect", "no-such-state"], "no such file or directory"),
        (["fit"], "the following arguments are required"),
        (["frobnicate"], "invalid choice"),
        (
            ["demo", "--events", "10"],
            "oddsmill: oddsmill demo: unrecognized arguments: --events 10 (oddsmill demo --help",
        ),
        # send: the file is read before anything connects, so these come at once, not after --wait
        (["send", "nowhere.jsonl", "--to", "tcp://127.0.0.1:1"], "nowhere.jsonl: no such file"),
        (["send", str(DEMO), "--to", "nowhere"], "--to: cannot connect to 'nowhere'"),
        (["send", str(DEMO), "--batch", "0"], "--batch must be >= 1, got 0"),
        (["send", str(DEMO), "--wait", "0"], "--wait must be > 0"),
        (["listen", "--from", "nowhere"], "--from: cannot connect to 'nowhere'"),
        (["listen", "--count", "0"], "--count must be >= 1, got 0"),
        (["listen", "--timeout", "-1"], "--timeout must be > 0"),
        (["keys", str(DEMO)], f"cannot make the directory {DEMO} (File exists)"),  # (a traceback before)
        (["keys", "/proc/no-such-dir"], "cannot make the directory /proc/no-such-dir"),
        (["keys", "/proc/no-such-dir", "--name", "../up"], "--name must be a plain file name, got '../up'"),
    ],
)
def test_usage_errors_exit_2_with_one_line(argv: list[str], needle: str, capsys) -> None:  # type: ignore[no-untyped-def]
    code, _, err = run(argv, capsys)
    assert code == 2
    assert needle in err
    assert len(err.strip().splitlines()) == 1


@pytest.mark.parametrize("candidates", [[], ["--candidates", "auto"]])
def test_a_replay_that_learns_nothing_is_refused_and_writes_no_state(
    tmp_path: Path, capsys, candidates: list[str]
) -> None:  # type: ignore[no-untyped-def]
    """An empty log, or one of scoring requests only, is refused (exit 2, the file named) and leaves
    no state: a checkpoint of nothing would be served from as if it were warm. An empty directory
    given as the state is let go of, so the next replay can take it."""
    (tmp_path / "empty.jsonl").write_text("")
    (tmp_path / "scores.jsonl").write_text('{"x": {"distance_km": 3.0}}\n{"id": "p2", "x": {}}\n')
    (tmp_path / "given").mkdir()
    for log, messages in (("empty.jsonl", 0), ("scores.jsonl", 2)):
        for state in ("s", "given"):
            argv = ["replay", str(tmp_path / log), "--state", str(tmp_path / state), *candidates]
            code, out, err = run(argv, capsys)
            assert code == 2, (out, err)
            assert f"{tmp_path / log}: no labelled event to learn from in {messages} message(s)" in err
            assert "no state was written" in err and out == ""
            assert not (tmp_path / "s").exists()
            assert [p.name for p in (tmp_path / "given").iterdir()] in ([], ["lock"])
    code, out, err = run(["replay", str(DEMO), "--state", str(tmp_path / "given"), *candidates], capsys)
    assert code == 0 and "checkpoint" in out, err


def test_inspect_of_a_model_with_no_labelled_events_says_so(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """No labelled events (a daemon's first checkpoint, before any outcome): inspect says so in words
    (it printed "log-loss nan")."""
    from oddsmill.cli import checkpoint_state
    from oddsmill.offline import new_engine
    from oddsmill.settings import LearnerSettings
    from oddsmill.storage import write_checkpoint

    engine, _ = new_engine(LearnerSettings(), 1, False)
    write_checkpoint(tmp_path / "s", 0, checkpoint_state(engine))
    code, out, err = run(["inspect", str(tmp_path / "s")], capsys)
    assert code == 0, err
    assert "no labelled events yet: no progressive log-loss" in out and "nan" not in out


@pytest.mark.parametrize(
    ("lines", "says"),
    [
        ([], "no events"),
        (['{"x": {"a": 1}, "y": 1}'], ":1: not a line of the demo's log"),  # a training event, no id or ts
        (['{"id": "p1", "x": {"a": 1}, "ts": 1.7e9}', '{"id": "p2", "y": 1, "ts": 1.7e9}'], ":2: not a line"),
        (['{"id": "p1", "x": {"a": 1}, "ts": "Monday"}'], ":1: not a line"),
    ],
)
def test_the_demo_refuses_a_log_not_of_its_shape_before_starting(  # type: ignore[no-untyped-def]
    lines: list[str], says: str, tmp_path: Path, capsys
) -> None:
    """An other log crashed the demo mid-run (KeyError: 'ts'), after its daemon had started."""
    import glob
    import tempfile

    before = set(glob.glob(f"{tempfile.gettempdir()}/oddsmill-demo-*"))
    log = tmp_path / "other.jsonl"
    log.write_text("".join(line + "\n" for line in lines))
    code, out, err = run(["demo", "--data", str(log)], capsys)
    assert code == 2
    assert says in err and len(err.strip().splitlines()) == 1
    assert "dashboard" not in out  # refused before the daemon started
    assert set(glob.glob(f"{tempfile.gettempdir()}/oddsmill-demo-*")) == before  # and nothing left behind


@pytest.mark.parametrize(
    "there,count,code",
    [("quiet", ["--count", "2"], 1), ("quiet", [], 0), ("nothing", [], 1)],
    ids=["short of --count", "no --count", "nothing there"],
)
def test_listen_says_how_many_came_before_the_silence(there: str, count: list[str], code: int, capsys) -> None:  # type: ignore[no-untyped-def]
    """Silence ends `listen --timeout`: with nothing published at the address, it exited 0 without
    a word, --count unmet. Now one line on stderr says what came; the exit code is 1 when --count
    was not reached (PROTOCOL 7: 1, other failure), 0 when none was asked of a quiet daemon, and 1
    with the reason when nothing came because nothing accepts connections there."""
    import socket

    import zmq

    ctx = zmq.Context.instance()
    quiet = ctx.socket(zmq.PUB)  # a daemon's scores socket, publishing nothing
    quiet.setsockopt(zmq.LINGER, 0)
    quiet.bind("tcp://127.0.0.1:*")
    address = quiet.getsockopt(zmq.LAST_ENDPOINT).decode()
    if there == "nothing":
        quiet.close()
        with socket.socket() as s:  # a port nothing listens on
            s.bind(("127.0.0.1", 0))
            address = f"tcp://127.0.0.1:{s.getsockname()[1]}"
    try:
        got, out, err = run(["listen", "--from", address, "--timeout", "0.3", *count], capsys)
    finally:
        quiet.close()
    assert got == code and out == ""
    wanted = " of 2" if count else ""
    why = ": nothing accepts connections there" if there == "nothing" else ""
    assert err == f"oddsmill listen: 0{wanted} messages from {address}, then 0.3 s of silence{why}\n"


def test_send_without_a_daemon_says_so_and_exits_1(capsys) -> None:  # type: ignore[no-untyped-def]
    """No daemon subscribed at the address within --wait: one line naming the address, exit 1 (it
    was a TimeoutError's traceback after 10 s). The line says that a daemon's first start listens
    only once it has compiled: a `send` begun beside it gave up saying nothing accepted connections."""
    import socket

    with socket.socket() as s:  # a port nothing listens on
        s.bind(("127.0.0.1", 0))
        address = f"tcp://127.0.0.1:{s.getsockname()[1]}"
    code, _, err = run(["send", str(DEMO), "--to", address, "--wait", "0.3"], capsys)
    assert code == 1
    assert err.strip() == (
        f"oddsmill: no daemon took the stream at {address} within 0.3 s: nothing accepts connections there"
        f" (is `oddsmill serve` running with --ingest {address}? Its first start after an install compiles for up"
        " to two minutes before it listens; --wait gives it longer)"
    )
    # with --kind push it waited for ever: a PUSH queues, then waits while nothing takes its messages
    code, _, err = run(["send", str(DEMO), "--to", address, "--wait", "0.3", "--kind", "push"], capsys)
    assert code == 1
    assert err.strip() == (
        f"oddsmill: no daemon took the stream at {address} within 0.3 s: nothing accepts connections there"
        f" (is `oddsmill serve --ingest-kind pull` running with --ingest {address}? Its first start after an"
        " install compiles for up to two minutes before it listens; --wait gives it longer)"
    )


def test_config_file_and_flags(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    cfg = tmp_path / "oddsmill.toml"
    cfg.write_text('[learner]\nschedule = "adagrad"\neta0 = 0.2\nwindow = 500\n')
    code, _, _ = run(
        [
            "replay",
            str(DEMO),
            "--state",
            str(tmp_path / "s"),
            "--config",
            str(cfg),
            "--eta0",
            "0.3",
        ],
        capsys,
    )
    assert code == 0
    doc = json.loads(run(["inspect", str(tmp_path / "s"), "--json"], capsys)[1])
    assert doc["learner"]["schedule"] == "adagrad" and doc["learner"]["eta0"] == 0.3
    cfg.write_text('[learner]\nshedule = "adagrad"\n')
    code, _, err = run(["fit", str(DEMO), "--config", str(cfg)], capsys)
    assert code == 2 and "unknown setting learner.shedule" in err


def test_aliased_fit_is_refused_with_the_names(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    log = tmp_path / "aliased.jsonl"
    rng = np.random.default_rng(0)
    with open(log, "w") as f:
        for _ in range(300):
            f.write(
                json.dumps(
                    {
                        "x": {
                            "service": str(rng.choice(["standard", "express"])),
                            "route_km": float(rng.gamma(3, 10)),
                        },
                        "y": int(rng.random() < 0.3),
                    }
                )
                + "\n"
            )
    code, _, err = run(["fit", str(log), "--l2", "0"], capsys)
    assert code == 2 and "aliased" in err and "service=" in err
    code, _, _ = run(["fit", str(log), "--l2", "1e-6"], capsys)
    assert code == 0


def test_demo_summary_agrees_with_the_fit(tmp_path: Path, monkeypatch, capsys) -> None:  # type: ignore[no-untyped-def]
    """The demo's summary against a Newton fit of its log, and the state it keeps for a look
    inside (in this test's directory: each run of the suite left 6 MB in the machine's /tmp)."""
    import argparse
    import gzip
    import tempfile

    from oddsmill.demo import run_demo
    from oddsmill.offline import fit_logs
    from oddsmill.settings import LearnerSettings

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    buf = io.StringIO()
    with redirect_stdout(buf):
        assert run_demo(argparse.Namespace(data=None, keep_running=False), out=buf) == 0
    text = buf.getvalue()
    kept = [line.removeprefix("state: ") for line in text.splitlines() if line.startswith("state: ")]
    assert len(kept) == 1 and Path(kept[0]).parent.parent == tmp_path
    assert f"look inside: oddsmill inspect {kept[0]}" in text
    code, out, _ = run(["inspect", kept[0], "--json"], capsys)
    with gzip.open(DEMO, "rt") as f:
        outcomes = sum(1 for line in f if '"y"' in line)
    model = json.loads(out)
    assert code == 0 and model["step"] == outcomes  # every outcome of the demo's log learned
    with gzip.open(DEMO, "rt") as f:  # the names of the log's features, and nothing else (no probe's)
        names = {
            k if not isinstance(v, str) else f"{k}={v}"
            for line in f
            for k, v in json.loads(line).get("x", {}).items()
            if v is not None
        }
    assert {c["feature"] for c in model["coefficients"]} <= names
    res, _ = fit_logs([str(DEMO)], LearnerSettings())
    assert f"log-loss {res.log_loss:.4f}" in text
    assert "a week of snow" in text
    snow = [line for line in text.splitlines() if "a week of snow" in line][0]
    others = [
        float(line.split()[-1])
        for line in text.splitlines()
        if line[:4].strip().isdigit() and "snow" not in line and "after" not in line
    ][1:]
    assert float(snow.split()[3]) > max(others)  # the drift shows in the scores


def test_progress_shows_on_a_terminal_only() -> None:
    from oddsmill.engine import Engine
    from oddsmill.learner import Learner
    from oddsmill.offline import Progress

    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    engine = Engine(Learner())
    tty, pipe = Terminal(), io.StringIO()
    for stream in (tty, pipe):
        bar = Progress(engine, "epoch 1/1", stream)
        bar.last = -1e9  # as if the last update were long ago
        bar(10)
        bar.done()
    assert "events/s" in tty.getvalue() and "log-loss" in tty.getvalue()
    assert pipe.getvalue() == ""


def test_replay_races_the_candidates_and_inspect_lists_them(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """`replay --candidates auto` runs the race on a log and prints the table; `inspect` lists the
    candidates with their figures. Each candidate is a full learner: its progressive log-loss
    equals that of a plain `replay` with its settings, bit for bit (checked for the serving one
    and the first one)."""
    state = tmp_path / "race"
    code, replayed, _ = run(["replay", str(DEMO), "--state", str(state), "--candidates", "auto"], capsys)
    assert code == 0
    lines = replayed.splitlines()
    rows = [line for line in lines if line.startswith("eta0=")]
    assert len(rows) == 12 and sum("<- serves" in row for row in rows) == 1
    # the figures in their columns, under their heads, the longest name too ("...,no-average")
    head = next(line for line in lines if line.startswith("candidate"))
    assert {len(row.removesuffix("  <- serves")) for row in rows} == {len(head)}
    assert max(len(row.split()[0]) for row in rows) > 28
    code, out, _ = run(["inspect", str(state), "--json"], capsys)
    assert code == 0
    doc = json.loads(out)
    table = doc["candidates"]
    assert [c["step"] for c in table] == [28_000] * 12
    assert sum(c["serving"] for c in table) == 1
    served = next(c for c in table if c["serving"])
    assert doc["learner"] == served["learner"]  # the model inspect shows is the serving one's
    assert len(doc["switches"]) == sum(line.startswith("switch at") for line in replayed.splitlines())
    assert doc["switches"][-1]["to"] == served["candidate"]  # serving: where the last switch went
    # the demo's log drifts (a week of snow): the race ends on a candidate of the last iterate
    assert served["candidate"].endswith(",no-average") and not served["learner"]["average"]
    code, text, _ = run(["inspect", str(state)], capsys)
    assert code == 0 and "race of 12 candidates" in text and "<- serves" in text
    rows = [line for line in text.splitlines() if line.startswith("  eta0=")]
    head = next(line for line in text.splitlines() if line.startswith("  candidate"))
    assert len(rows) == 12 and {len(row.removesuffix("  <- serves")) for row in rows} == {len(head)}
    for c in {served["candidate"]: served, table[0]["candidate"]: table[0]}.values():
        alone = tmp_path / c["candidate"].replace("=", "_").replace(",", "_")
        flags = ["--eta0", str(c["learner"]["eta0"]), "--l2", str(c["learner"]["l2"])]
        flags += [] if c["learner"]["average"] else ["--no-average"]
        assert run(["replay", str(DEMO), "--state", str(alone), *flags], capsys)[0] == 0
        _, out, _ = run(["inspect", str(alone), "--json"], capsys)
        single = json.loads(out)
        assert single["learner"] == c["learner"]
        assert single["metrics"]["log_loss"] == c["log_loss"]
        assert single["metrics"]["log_loss_window"] == c["log_loss_window"]


COMPILE_PROBE = r"""
import logging, sys
import numpy as np
logging.basicConfig(level=logging.INFO, format="oddsmill: %(message)s")
import oddsmill
oddsmill.SAY_AFTER = float(sys.argv[1])
from oddsmill import columnar
columnar.probabilities(np.zeros(2))  # two compiled functions (_probabilities calls _p)
"""


def test_a_long_compile_says_so_and_a_cached_or_short_one_does_not(tmp_path: Path) -> None:
    """On a fresh machine the first command compiled the package for two minutes without a word
    (`oddsmill demo`'s first line came after it). One line says so, once a process, and only when
    numba compiles rather than loads (a cache of the test's own: NUMBA_CACHE_DIR), and only a
    compile that runs past SAY_AFTER: a warm cache's odd small compile said "two minutes" for a
    fraction of a second. The probe's compile takes a fraction of a second: at SAY_AFTER 0 it is
    announced, at 60 it is not."""
    import os
    import subprocess
    import sys

    from oddsmill import COMPILING

    def probe(cache: Path, say_after: float) -> str:
        env = {**os.environ, "NUMBA_CACHE_DIR": str(cache)}
        run = subprocess.run(
            [sys.executable, "-c", COMPILE_PROBE, str(say_after)], env=env, capture_output=True, text=True, check=True
        )
        return run.stderr

    first, cached = probe(tmp_path / "a", 0.0), probe(tmp_path / "a", 0.0)
    assert first.count(COMPILING) == 1, first
    assert COMPILING not in cached, cached  # loaded from the cache the first run left
    short = probe(tmp_path / "b", 60.0)
    assert COMPILING not in short, short
    assert (tmp_path / "b").exists()  # (it did compile, into its own cache)


def _parcels(path: Path, late_depot: int, all_late: bool = False) -> Path:
    """400 parcels: route_km, and the depot Fenwick Yard on the first `late_depot` late ones only."""
    rng = np.random.default_rng(8)
    km = rng.normal(20.0, 6.0, 400)
    late = np.ones(400, dtype=bool) if all_late else rng.random(400) < 1 / (1 + np.exp(-(km - 20.0) / 6.0))
    with path.open("w") as f:
        fenwick = 0
        for i in range(400):
            x: dict[str, object] = {"route_km": round(float(km[i]), 2)}
            if late[i] and fenwick < late_depot:
                x["depot"] = "Fenwick Yard"
                fenwick += 1
            f.write(json.dumps({"id": f"P{i:06d}", "x": x, "y": int(late[i])}) + "\n")
    return path


def test_replay_and_inspect_say_when_the_vocabulary_was_full(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    log = tmp_path / "wide.jsonl"
    log.write_text(
        "".join(json.dumps({"x": {f"f{j}": float(i * j % 7) for j in range(6)}, "y": i % 2}) + "\n" for i in range(50))
    )
    line = (
        "the vocabulary is full (max_features 3): 150 values of names not seen before were ignored (not learned);"
        " raise --max-features"
    )
    code, out, _ = run(["replay", str(log), "--state", str(tmp_path / "s"), "--max-features", "3"], capsys)
    assert code == 0 and line in out.splitlines()
    code, out, _ = run(["inspect", str(tmp_path / "s")], capsys)
    assert code == 0 and line in out.splitlines()
    code, out, _ = run(["fit", str(log), "--max-features", "3"], capsys)  # the fit's features: the same three
    assert code == 0 and f"warning: {line}" in out.splitlines()
    code, out, _ = run(["fit", str(log), "--max-features", "3", "--json"], capsys)
    assert {"kind": "vocabulary_full", "features": [], "detail": line} in json.loads(out)["warnings"]
    code, out, _ = run(["replay", str(log), "--state", str(tmp_path / "t")], capsys)  # room for all six
    assert code == 0 and "vocabulary is full" not in out


def test_fit_says_which_coefficients_the_penalty_holds(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A depot whose every parcel was late: at the default L2 its coefficient is finite, with a
    standard error and a p-value, but they are the penalty's. They were printed as if they were
    the data's, with nothing to say so (tests/test_reference.py holds the diagnosis against
    statsmodels)."""
    log = _parcels(tmp_path / "parcels.jsonl", late_depot=9)
    code, out, _ = run(["fit", str(log)], capsys)
    assert code == 0
    assert out.splitlines()[-1] == (
        "warning: present only in events of one outcome, so without the L2 penalty their coefficients would grow "
        "without bound; their sizes, standard errors, z and p-values here are the penalty's (L2 = 0.0001), not "
        "the data's: depot=Fenwick Yard (9 events, all y = 1)"
    )
    code, out, _ = run(["fit", str(log), "--json"], capsys)
    assert code == 0
    (warning,) = json.loads(out)["warnings"]
    assert warning["kind"] == "one_outcome" and warning["features"] == ["depot=Fenwick Yard"]
    code, out, err = run(["fit", str(log), "--l2", "0"], capsys)
    assert code == 2 and out == ""
    assert err.startswith("oddsmill: these features are present only in events of one outcome: depot=Fenwick Yard")


def test_fit_refuses_a_log_of_one_outcome(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """Every parcel late: the intercept ran off to 38 in 38 iterations, "NOT converged", with NaN
    standard errors, and the command exited 0."""
    code, out, err = run(["fit", str(_parcels(tmp_path / "late.jsonl", 0, all_late=True))], capsys)
    assert code == 2 and out == ""
    assert err == (
        "oddsmill: all 400 labelled events have y = 1: with one outcome only the log-likelihood has no maximum "
        "(the intercept, which is not penalised, grows without bound); a fit needs events of both outcomes\n"
    )


def test_fit_refuses_logs_without_a_labelled_event(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """An empty log, or scoring requests only, is bad input as a log of one outcome is (exit 2):
    it exited 1, the code of a failure of the program's own."""
    empty = tmp_path / "empty.jsonl"
    empty.write_text("")
    requests = tmp_path / "requests.jsonl"
    requests.write_text('{"id": "P1", "x": {"route_km": 3.0}}\n')
    for log in (empty, requests):
        code, out, err = run(["fit", str(log)], capsys)
        assert (code, out) == (2, "")
        assert err == "oddsmill: no labelled events to fit: a fit needs events with y, of both outcomes\n"


@pytest.mark.parametrize("free", [1 << 20, None], ids=["estimated first", "numpy's MemoryError"])
def test_a_fit_too_large_for_the_memory_says_so(free: int | None, monkeypatch, capsys) -> None:  # type: ignore[no-untyped-def]
    """A log whose dense design matrix does not fit in memory: the fit stopped with numpy's
    MemoryError and a traceback (44.7 GiB asked for 300,000 events x 20,000 features, here), or,
    short of that, paged until the OOM killer came. One line now, with the sizes, exit 1, before
    the matrix is made when the system says what is free (here made to say 1 MiB), and from the
    MemoryError when it does not (here made to come from the fit)."""
    from oddsmill import offline

    monkeypatch.setattr(offline, "available_bytes", lambda: free)
    if free is None:

        def short(*args: object) -> None:
            raise MemoryError

        monkeypatch.setattr(offline, "newton_fit", short)
    code, out, err = run(["fit", str(DEMO)], capsys)
    assert code == 1 and out == ""
    need = offline.fit_bytes(28_000, 16) / 2**20  # the demo log's labelled events and features
    have = ", and 1 MiB is available" if free else ""
    assert err == (
        f"oddsmill: the Newton fit of 28,000 events x 16 features needs about {need:.0f} MiB of memory{have}:"
        " fit part of the log (the fit holds every event as a dense row)\n"
    )


def test_inspect_of_a_daemon_before_its_first_checkpoint_says_what_is_there(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A daemon writes its first checkpoint after --checkpoint-seconds or at its stop; before that
    (or killed before it), `inspect`, `report` and `fit --against` said only "no checkpoint in this
    directory", as of an empty one, though the journal holds what it learned."""
    from tests.conftest import handled_once

    handled_once(tmp_path / "live", [{"x": {"route_km": float(k)}, "y": k % 2} for k in range(40)]).close()
    size = (tmp_path / "live" / "journal-000000000000.omj").stat().st_size
    for argv in (["inspect", str(tmp_path / "live")], ["report", str(tmp_path / "live"), "--out", "r.html"]):
        code, out, err = run(argv, capsys)
        assert code == 2 and out == ""
        assert err.strip() == (
            f"oddsmill: {tmp_path / 'live'}: no checkpoint yet, but a journal (1 segment, {size:,} bytes): "
            "`serve` learns it when it starts on this directory, and writes a checkpoint every "
            "--checkpoint-seconds and when it stops"
        )
    (tmp_path / "empty").mkdir()
    code, _, err = run(["inspect", str(tmp_path / "empty")], capsys)
    assert code == 2 and err.strip() == f"oddsmill: {tmp_path / 'empty'}: no checkpoint in this directory"


def test_a_replay_whose_checkpoint_cannot_be_written_says_so_in_one_line(  # type: ignore[no-untyped-def]
    tmp_path: Path, capsys, monkeypatch
) -> None:
    """A full disk under `replay`'s checkpoint gave a traceback ending in OSError (ENOSPC, seen on a
    100 KiB tmpfs). Now one line (exit 1) says the events learned are not saved, and no partial
    file is left. (The disk is filled here by an fsync that fails as a full disk's does.)"""
    import errno
    import os

    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "fsync", full)
    for extra in ([], ["--candidates", "auto"]):
        state = tmp_path / f"s{len(extra)}"
        code, out, err = run(["replay", str(DEMO), "--state", str(state), *extra], capsys)
        assert code == 1 and "checkpoint" not in out
        assert err.strip() == (
            f"oddsmill: cannot write the checkpoint into {state} (No space left on device): the 28,000 events "
            "learned are not saved"
        )
        assert sorted(p.name for p in state.iterdir()) == ["lock"]


def test_a_reader_that_stops_early_ends_the_command_quietly(tmp_path: Path) -> None:
    """`oddsmill inspect STATE | head -2` printed a traceback (BrokenPipeError) once `head` had its
    lines, and so did `fit` (seen by hand). A command whose stdout reader has gone now stops with
    exit 1 and nothing on stderr, as the Python documentation advises (the signal module's note on
    SIGPIPE). The reader here is gone before the first line is written."""
    import subprocess
    import sys

    assert main(["replay", str(DEMO), "--state", str(tmp_path / "s")]) == 0
    for argv in (["prometheus", "rules"], ["inspect", str(tmp_path / "s"), "--top", "50"]):
        proc = subprocess.Popen(
            [sys.executable, "-m", "oddsmill.cli", *argv], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
        )
        assert proc.stdout is not None and proc.stderr is not None
        proc.stdout.close()
        err = proc.stderr.read()
        assert proc.wait(120) == 1, err
        assert "Traceback" not in err and "Exception ignored" not in err, err


def test_inspect_says_how_far_the_journal_is_ahead_of_the_checkpoint(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A state directory inspected while its daemon serves: the newest checkpoint's model, which
    showed step 0 after a start with nothing to say that the daemon had learned more. Now the
    first lines say when the checkpoint was written and how many bytes of journal came after it
    (here: the records of two messages handled after the checkpoint, counted from the file)."""
    import msgpack
    import zmq
    from oddsmill.server import Server, ServerSettings

    ctx: zmq.Context[object] = zmq.Context()
    pub = ctx.socket(zmq.PUB)
    pub.bind("inproc://inspect-ahead")
    server = Server(ServerSettings(state_dir=tmp_path / "live", http="off"))
    server.handle([[b"events", msgpack.packb({"x": {"route_km": 1.0}, "y": 1})]], pub)
    server.checkpoint()
    covered = server.journal.tell()
    code, out, _ = run(["inspect", str(tmp_path / "live")], capsys)
    assert code == 0 and "; the journal has nothing after it" in out.splitlines()[2]
    server.handle([[b"events", msgpack.packb({"x": {"route_km": r}, "y": 0})] for r in (2.0, 3.0)], pub)
    ahead = server.journal.tell() - covered
    assert ahead > 0
    code, out, _ = run(["inspect", str(tmp_path / "live")], capsys)
    assert code == 0 and out.splitlines()[0].startswith("step 1 ")  # the checkpoint's model
    assert f"; the journal has {ahead:,} bytes after it, which a daemon serving" in out.splitlines()[2]
    server.journal.close()
    pub.close(0)
    ctx.term()


def test_replay_leaves_the_time_spent_compiling_out_of_its_rate(tmp_path: Path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """The first command after an install compiles numba's code on the way; replay's events/s is
    the replay's own, and the line says how long the compiling took. (Here a function of the test's
    own, compiled inside the replay's first block and sleeping 1.5 s in its compile, stands in for
    the package's: the package's own are in the cache.)"""
    import time

    import numba
    from numba.core import event
    from oddsmill import compile_seconds, learner

    @numba.njit
    def fresh(x):  # type: ignore[no-untyped-def]
        return x + 1

    class Slow(event.Listener):
        def on_start(self, ev) -> None:  # type: ignore[no-untyped-def]
            time.sleep(1.5)

        def on_end(self, ev) -> None:  # type: ignore[no-untyped-def]
            pass

    real = learner.Learner.run_segments
    compiled = []

    def run_segments(self, segments):  # type: ignore[no-untyped-def]
        if not compiled:
            compiled.append(fresh(1))
        return real(self, segments)

    monkeypatch.setattr(learner.Learner, "run_segments", run_segments)
    before = compile_seconds()
    slow = Slow()
    event.register("numba:compile", slow)  # type: ignore[no-untyped-call]
    try:
        t0 = time.monotonic()
        code, out, _ = run(["replay", str(DEMO), "--state", str(tmp_path / "s")], capsys)
        wall = time.monotonic() - t0
    finally:
        event.unregister("numba:compile", slow)  # type: ignore[no-untyped-call]
    assert code == 0 and compiled == [2]
    spent = compile_seconds() - before
    assert spent >= 1.5
    line = out.splitlines()[0]
    seconds = float(line.split(" epoch(s), ")[1].split(" s ")[0])
    assert seconds < wall - 1.4  # the compiling is not in the replay's time
    assert line.endswith(f", and {spent:.0f} s compiling first")


def test_every_option_and_argument_says_what_it_is() -> None:
    """`--help` listed 40 options and arguments (each command's own) with no word on them (--warm-start, --scaling,
    --max-features, send's --to, fit's LOG, ...): each now has a line."""
    import argparse

    from oddsmill.cli import build_parser

    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    bare = [
        f"{name} {'/'.join(action.option_strings) or action.dest}"
        for name, parser in sub.choices.items()
        for action in parser._actions
        if not isinstance(action, argparse._HelpAction) and not action.help
    ]
    assert bare == []
