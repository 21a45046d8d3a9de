"""CURVE (PROTOCOL 1): with keys configured, only allowed clients feed or read the daemon.

Keys are made by `oddsmill keys`; the daemon allows the public keys in a directory. An unknown
producer's events are never learned (nor journaled), and an unknown subscriber receives nothing,
while an allowed client on the same daemon is served. With CURVE, binding off loopback is allowed."""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import Any

import pytest
import zmq
from oddsmill.errors import ConfigError
from oddsmill.server import ServerSettings
from oddsmill.settings import LearnerSettings
from oddsmill.storage import list_journal, read_journal
from oddsmill_client import CurveKeys, Producer, ScoreSubscriber

from tests.conftest import RunningServer
from tests.test_watching import run_cli
from tests.tools import names_in


@pytest.fixture
def keys(tmp_path: Path) -> dict[str, Path]:
    for where, name in (("daemon", "daemon"), ("alice", "alice"), ("mallory", "mallory")):
        code, said = run_cli("keys", str(tmp_path / where), "--name", name)
        assert code == 0 and "secret key" in said
    allowed = tmp_path / "allowed"
    allowed.mkdir()
    shutil.copy(tmp_path / "alice" / "alice.key", allowed)
    assert (tmp_path / "alice" / "alice.key_secret").stat().st_mode & 0o077 == 0  # owner only
    assert run_cli("keys", str(tmp_path / "alice"), "--name", "alice")[0] == 2  # never overwrites
    return {
        "daemon_secret": tmp_path / "daemon" / "daemon.key_secret",
        "daemon_public": tmp_path / "daemon" / "daemon.key",
        "allowed": allowed,
        "alice": tmp_path / "alice" / "alice.key_secret",
        "mallory": tmp_path / "mallory" / "mallory.key_secret",
    }


def curve_daemon(tmp_path: Path, keys: dict[str, Path]) -> tuple[RunningServer, CurveKeys, CurveKeys]:
    """A daemon that requires CURVE and allows alice; alice's and mallory's client keys."""
    settings = ServerSettings(
        state_dir=tmp_path / "state",
        ingest="tcp://127.0.0.1:*",
        scores="tcp://127.0.0.1:*",
        http="off",
        curve_secret=str(keys["daemon_secret"]),
        curve_clients=str(keys["allowed"]),
    )
    alice = CurveKeys.load(keys["alice"], keys["daemon_public"])
    mallory = CurveKeys.load(keys["mallory"], keys["daemon_public"])
    return RunningServer(settings, LearnerSettings()), alice, mallory


def test_only_allowed_clients_feed_or_read_the_daemon(tmp_path: Path, keys: dict[str, Path]) -> None:
    running, alice, mallory = curve_daemon(tmp_path, keys)
    server, ctx = running.server, running.ctx
    ingest, scores = server.bound["ingest"], server.bound["scores"]
    try:
        # an unknown producer never gets the daemon's subscription, with a wrong key or with none
        with pytest.raises(TimeoutError):
            Producer(ingest, curve=mallory, wait_for_daemon=2.0, context=ctx)
        with pytest.raises(TimeoutError):
            Producer(ingest, wait_for_daemon=2.0, context=ctx)
        # nor is a PUSH from one delivered, though ZeroMQ lets it queue
        intruder = ctx.socket(zmq.PUSH)
        intruder.setsockopt(zmq.LINGER, 0)
        mallory.apply(intruder)
        intruder.connect(ingest)

        spy = ScoreSubscriber(scores, curve=mallory, context=ctx)
        plain_spy = ScoreSubscriber(scores, context=ctx)
        with (
            ScoreSubscriber(scores, curve=alice, context=ctx) as mine,
            Producer(ingest, curve=alice, context=ctx) as out,
        ):
            mine.await_daemon(out)
            step0 = server.engine.learner.step
            for i in range(50):
                intruder.send_multipart(
                    [b"events", b"\x82\xa1x\x81\xa5stolen\xcb?\xf0\x00\x00\x00\x00\x00\x00\xa1y\x01"]
                )
                out.send({"id": f"P{i}", "x": {"route_km": 10.0 + i}, "y": i % 2})
            got = [mine.receive(timeout=10.0) for _ in range(50)]
        assert [body["id"] for _, body in got] == [f"P{i}" for i in range(50)]
        assert server.engine.learner.step == step0 + 50  # alice's events, and nothing else
        for who in (spy, plain_spy):
            with pytest.raises(TimeoutError):
                who.receive(timeout=1.0)
            who.close()
        intruder.close()
    finally:
        running.close()
    journaled = [body for seg in list_journal(tmp_path / "state") for _, _, body in read_journal(seg)]
    assert not any("stolen" in str(body) for body in journaled)
    assert "stolen" not in names_in(server.engine.learner.state_dict())


def test_curve_allows_binding_off_loopback_and_refuses_half_a_configuration(
    tmp_path: Path, keys: dict[str, Path]
) -> None:
    with pytest.raises(ConfigError, match="not a loopback address"):
        ServerSettings(state_dir=tmp_path, ingest="tcp://0.0.0.0:7571")
    ServerSettings(
        state_dir=tmp_path,
        ingest="tcp://0.0.0.0:7571",
        scores="tcp://0.0.0.0:7572",
        curve_secret=str(keys["daemon_secret"]),
        curve_clients=str(keys["allowed"]),
    )
    with pytest.raises(ConfigError, match="go together"):
        ServerSettings(state_dir=tmp_path, curve_secret=str(keys["daemon_secret"]))
    with pytest.raises(ConfigError, match="no secret key"):
        ServerSettings(state_dir=tmp_path, curve_secret=str(keys["daemon_public"]), curve_clients=str(keys["allowed"]))
    with pytest.raises(ConfigError, match="not a directory"):
        ServerSettings(state_dir=tmp_path, curve_secret=str(keys["daemon_secret"]), curve_clients=str(tmp_path / "no"))


def test_the_send_and_listen_commands_take_client_keys(keys: dict[str, Path]) -> None:
    code = run_cli("listen", "--curve-secret", str(keys["alice"]), "--timeout", "0.1", "--count", "1")[0]
    assert code == 2  # --curve-server missing
    args: Any = ["listen", "--curve-secret", str(keys["alice"]), "--curve-server", str(keys["daemon_public"])]
    assert run_cli(*args, "--timeout", "0.2", "--count", "1")[0] == 1  # nobody there: silence, short of --count


def test_a_client_that_gets_nothing_is_told_why(tmp_path: Path, keys: dict[str, Path], capsys, caplog) -> None:  # type: ignore[no-untyped-def]
    """ZeroMQ retries a failed connection without a word: a producer or `send` without keys, with
    a key the daemon does not allow, or with the wrong daemon key said only "no daemon subscribed",
    as if nothing listened; `listen` said "0 messages, then silence" and exited 0. And a push
    producer queued its messages on a connection never made: `send --kind push` to an address
    where nothing listened printed "sent 100 events" and exited 0, the events gone. Each now says
    what ZeroMQ's handshake found (its monitor's events)."""
    from oddsmill_client import NoAnswer

    from tests.test_watching import free_port

    running, alice, mallory = curve_daemon(tmp_path, keys)
    ctx, ingest, scores = running.ctx, running.server.bound["ingest"], running.server.bound["scores"]
    alice_wrong_daemon = CurveKeys.load(keys["alice"], keys["alice"].with_suffix(".key"))
    plain_pull = ctx.socket(zmq.PULL)  # a daemon's ingest of the other kind, without CURVE: no pub producers
    plain_pull.setsockopt(zmq.LINGER, 0)
    plain_pull.bind("tcp://127.0.0.1:*")
    other_kind = plain_pull.getsockopt(zmq.LAST_ENDPOINT).decode()
    nowhere = f"tcp://127.0.0.1:{free_port()}"
    try:
        cases = [
            (ingest, "pub", None, "the daemon requires CURVE keys, and this client has none"),
            (ingest, "pub", mallory, "the daemon refused this client's key"),
            (ingest, "pub", alice_wrong_daemon, "the CURVE handshake failed"),
            (nowhere, "push", None, "nothing accepts connections there"),
            (nowhere, "pub", None, "nothing accepts connections there"),
        ]
        with caplog.at_level("WARNING", logger="oddsmill"):
            for address, kind, curve, says in cases:
                with pytest.raises(NoAnswer) as caught:
                    Producer(address, kind=kind, curve=curve, wait_for_daemon=1.0, context=ctx)
                assert caught.value.why is not None and caught.value.why.startswith(says), (kind, caught.value.why)
        # the daemon's log names the key it refused, once (ZeroMQ asked for it every 0.1 s or so)
        mallory_public = keys["mallory"].with_suffix(".key").read_text().split('public-key = "')[1].split('"')[0]
        assert caplog.messages == [
            f"refused a client whose public key {mallory_public} is not among those of {keys['allowed']} "
            "(said once a key)"
        ]
        with pytest.raises(NoAnswer, match="does not take this kind of client"):
            Producer(other_kind, kind="pub", curve=None, wait_for_daemon=1.0, context=ctx)
        with Producer(ingest, curve=alice, context=ctx) as out:  # the right keys: no complaint
            out.send({"x": {"route_km": 3.0}, "y": 1})
        for curve, says in ((None, "the daemon requires CURVE keys"), (mallory, "the daemon refused"), (alice, None)):
            with ScoreSubscriber(scores, curve=curve, context=ctx) as sub:
                why = sub.why_silent()
            assert (why is None) if says is None else (why is not None and why.startswith(says)), why

        log = tmp_path / "parcels.jsonl"
        log.write_text('{"x": {"route_km": 3.0}, "y": 1}\n' * 100)
        for argv, says in (
            (
                ["--kind", "push", "--to", nowhere],
                f"no daemon took the stream at {nowhere} within 1 s: nothing accepts",
            ),
            (["--to", ingest], "the daemon requires CURVE keys, and this client has none (--curve-secret and"),
        ):
            assert run_cli("send", str(log), "--wait", "1", *argv)[0] == 1
            assert says in capsys.readouterr().err
        assert run_cli("listen", "--from", scores, "--timeout", "0.5")[0] == 1
        assert capsys.readouterr().err.strip() == (
            f"oddsmill listen: 0 messages from {scores}, then 0.5 s of silence: the daemon requires CURVE keys, "
            "and this client has none (--curve-secret and --curve-server)"
        )
    finally:
        plain_pull.close()
        running.close()
