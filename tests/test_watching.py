"""Watching a daemon from outside: a real Prometheus scraping it, the shipped alert rules checked
by promtool, the terminal view driven under tmux, and the report rendered by Chromium."""

from __future__ import annotations

import contextlib
import io
import json
import os
import socket
import subprocess
import time
import urllib.parse
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from oddsmill.cli import main

from tests.conftest import DEMO, FedDaemon
from tests.test_dashboard import Page, counts_apart
from tests.tools import ARTIFACTS, chromium, require


def run_cli(*argv: str) -> tuple[int, str]:
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(list(argv))
    return code, out.getvalue()


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port: int = s.getsockname()[1]
        return port


def wait_for(what: str, check: Any, timeout: float = 30.0) -> Any:
    """Poll `check()` until it returns something truthy (the outside program's own answer, not a guess
    of time)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        got = check()
        if got:
            return got
        time.sleep(0.1)
    raise AssertionError(f"timed out waiting for {what}")


# -- alert rules and the example configuration -------------------------------------------------------
def test_the_shipped_rules_and_scrape_configuration_pass_promtool(tmp_path: Path) -> None:
    promtool = require("promtool")
    code, rules = run_cli("prometheus", "rules")
    assert code == 0
    (tmp_path / "oddsmill-rules.yml").write_text(rules)
    code, scrape = run_cli("prometheus", "scrape", "--http", "10.1.2.3:9999")
    assert code == 0 and '"10.1.2.3:9999"' in scrape
    (tmp_path / "prometheus.yml").write_text(scrape)
    done = subprocess.run(
        [promtool, "check", "rules", "oddsmill-rules.yml"], cwd=tmp_path, capture_output=True, text=True
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert "SUCCESS: 9 rules found" in done.stdout
    done = subprocess.run([promtool, "check", "config", "prometheus.yml"], cwd=tmp_path, capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr


RULE_TESTS = """
rule_files: [oddsmill-rules.yml]
evaluation_interval: 1m
tests:
  # a model whose recent log-loss climbs from its long-run 0.40 to 0.60: drift fires after 15 minutes
  - interval: 1m
    input_series:
      - series: 'oddsmill_log_loss{instance="d", job="oddsmill"}'
        values: '0.40x40'
      - series: 'oddsmill_log_loss_window{instance="d", job="oddsmill"}'
        values: '0.40x10 0.60x30'
      - series: 'oddsmill_log_loss_count_total{instance="d", job="oddsmill"}'
        values: '50000+100x40'
      - series: 'oddsmill_calibration_error_window{instance="d", job="oddsmill"}'
        values: '0.01x40'
    alert_rule_test:
      - eval_time: 20m
        alertname: OddsmillDrifting
        exp_alerts: []
      - eval_time: 30m
        alertname: OddsmillDrifting
        exp_alerts:
          - exp_labels: {severity: warning, instance: d, job: oddsmill}
            exp_annotations:
              summary: "d: recent log-loss 0.600 is 25% above the long-run figure"
      - eval_time: 30m
        alertname: OddsmillMiscalibrated
        exp_alerts: []
  # a vocabulary that fills at 10 minutes: 40 values ignored in the next minute, then none
  - interval: 1m
    input_series:
      - series: 'oddsmill_features_ignored_total{instance="d", job="oddsmill"}'
        values: '0x10 40x40'
    alert_rule_test:
      - eval_time: 9m
        alertname: OddsmillVocabularyFull
        exp_alerts: []
      - eval_time: 12m
        alertname: OddsmillVocabularyFull
        exp_alerts:
          - exp_labels: {severity: warning, instance: d, job: oddsmill}
            exp_annotations:
              summary: "d: 40 feature values of new names ignored in 15 minutes: the vocabulary is full"
      - eval_time: 40m
        alertname: OddsmillVocabularyFull
        exp_alerts: []
  # a disk losing 1 GB an hour with 20 GB free, then (a second daemon) with 30 GB free: the first
  # fills within a day at that pace and alerts once the pace has held 30 minutes, the second not
  - interval: 10m
    input_series:
      - series: 'oddsmill_state_free_bytes{instance="d", job="oddsmill"}'
        values: '20e9-166666667x60'
      - series: 'oddsmill_state_free_bytes{instance="e", job="oddsmill"}'
        values: '30e9-166666667x60'
    alert_rule_test:
      - eval_time: 20m
        alertname: OddsmillDiskFilling
        exp_alerts: []
      - eval_time: 2h
        alertname: OddsmillDiskFilling
        exp_alerts:
          - exp_labels: {severity: warning, instance: d, job: oddsmill}
            exp_annotations:
              summary: "d: the state directory's disk fills within a day at this pace"
  # a sequence gap, and checkpoints that stop at 10 minutes (alerting 15 + 5 minutes on)
  - interval: 1m
    input_series:
      - series: 'oddsmill_events_lost_total{instance="d", job="oddsmill"}'
        values: '0x10 3x20'
      - series: 'oddsmill_checkpoint_last_success_timestamp_seconds{instance="d", job="oddsmill"}'
        values: '0+60x10 600x30'
    alert_rule_test:
      - eval_time: 12m
        alertname: OddsmillEventsLost
        exp_alerts:
          - exp_labels: {severity: warning, instance: d, job: oddsmill}
            exp_annotations:
              summary: "d: 3 messages lost in 10 minutes"
      - eval_time: 25m
        alertname: OddsmillEventsLost
        exp_alerts: []
      - eval_time: 12m
        alertname: OddsmillCheckpointOld
        exp_alerts: []
      - eval_time: 35m
        alertname: OddsmillCheckpointOld
        exp_alerts:
          - exp_labels: {severity: critical, instance: d, job: oddsmill}
            exp_annotations:
              summary: "d: last checkpoint 25m 0s ago"
"""


def test_the_alert_rules_fire_on_drift_gaps_and_an_old_checkpoint(tmp_path: Path) -> None:
    # promtool's rule unit tests evaluate the shipped rules on synthetic series
    promtool = require("promtool")
    (tmp_path / "oddsmill-rules.yml").write_text(run_cli("prometheus", "rules")[1])
    (tmp_path / "tests.yml").write_text(RULE_TESTS)
    done = subprocess.run([promtool, "test", "rules", "tests.yml"], cwd=tmp_path, capture_output=True, text=True)
    assert done.returncode == 0, done.stdout + done.stderr


def test_a_bad_http_address_is_refused() -> None:
    assert run_cli("prometheus", "scrape", "--http", "no-port")[0] == 2
    assert run_cli("watch", "--http", "http://x/")[0] == 2


# -- a real Prometheus -------------------------------------------------------------------------------
class Prometheus:
    def __init__(self, target: str, workdir: Path) -> None:
        exe = require("prometheus")
        self.port = free_port()
        config = workdir / "prometheus.yml"
        config.write_text(
            "global: {scrape_interval: 1s, evaluation_interval: 1s}\n"
            f"scrape_configs:\n  - job_name: oddsmill\n    static_configs:\n      - targets: ['{target}']\n"
        )
        self.log = open(workdir / "prometheus.log", "w")  # noqa: SIM115 (closed in close())
        self.proc = subprocess.Popen(
            [
                exe,
                f"--config.file={config}",
                f"--storage.tsdb.path={workdir / 'data'}",
                f"--web.listen-address=127.0.0.1:{self.port}",
            ],
            stdout=self.log,
            stderr=subprocess.STDOUT,
        )
        wait_for("Prometheus to be ready", self._ready)

    def _ready(self) -> bool:
        assert self.proc.poll() is None, "prometheus exited; see prometheus.log"
        try:
            with urllib.request.urlopen(f"http://127.0.0.1:{self.port}/-/ready", timeout=2) as r:
                return bool(r.status == 200)
        except OSError:
            return False

    def query(self, promql: str) -> list[dict[str, Any]]:
        url = f"http://127.0.0.1:{self.port}/api/v1/query?" + urllib.parse.urlencode({"query": promql})
        with urllib.request.urlopen(url, timeout=10) as r:
            doc = json.load(r)
        assert doc["status"] == "success", doc
        result: list[dict[str, Any]] = doc["data"]["result"]
        return result

    def value(self, promql: str) -> float | None:
        result = self.query(promql)
        return float(result[0]["value"][1]) if result else None

    def close(self) -> None:
        self.proc.terminate()
        self.proc.wait(20)
        self.log.close()


@pytest.fixture
def prometheus_and_daemon(tmp_path: Path) -> Iterator[tuple[Prometheus, FedDaemon]]:
    require("prometheus")
    daemon = FedDaemon(tmp_path / "state")
    prom = Prometheus(daemon.server.bound["http"], tmp_path)
    try:
        yield prom, daemon
    finally:
        prom.close()
        daemon.close()


def test_prometheus_scrapes_the_daemon_and_agrees_with_its_figures(
    prometheus_and_daemon: tuple[Prometheus, FedDaemon],
) -> None:
    prom, daemon = prometheus_and_daemon
    # Prometheus has seen the fresh daemon at step 0 before any event is sent ...
    wait_for("a first scrape", lambda: prom.value("oddsmill_updates_total") == 0.0)
    daemon.feed(6000)
    status = daemon.status()
    # ... and then at its final step
    wait_for("the last scrape", lambda: prom.value("oddsmill_updates_total") == float(status["step"]))
    assert status["step"] == daemon.learned > 1000
    counts = prom.query("oddsmill_log_loss_count_total[30s]")[0]["values"]
    assert float(counts[0][1]) == 0.0, "the window must reach back to before the first event"
    sums = prom.query("oddsmill_log_loss_sum_total[30s]")[0]["values"]
    assert float(sums[-1][1]) == pytest.approx(status["log_loss_sum"], rel=1e-15)
    assert float(counts[-1][1]) == status["log_loss_count"]
    # over a window that holds the whole stream, the mean log-loss PromQL computes is the daemon's
    # progressive log-loss
    ratio = prom.value("rate(oddsmill_log_loss_sum_total[30s]) / rate(oddsmill_log_loss_count_total[30s])")
    assert ratio == pytest.approx(status["log_loss"], rel=1e-9)
    assert prom.value("oddsmill_log_loss") == pytest.approx(status["log_loss"], rel=1e-15)
    assert prom.value('oddsmill_events_total{kind="outcome"}') == float(status["events"]["outcome"])
    print(f"Prometheus: step {status['step']}, mean log-loss by rate() {ratio:.6f}, daemon {status['log_loss']:.6f}")


# -- the terminal view ---------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def fed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[FedDaemon]:
    daemon = FedDaemon(tmp_path_factory.mktemp("state"))
    daemon.feed(4000)
    yield daemon
    daemon.close()


def test_watch_shows_the_figures_live_in_a_terminal(fed: FedDaemon) -> None:
    tmux = require("tmux")
    sock = f"oddsmill-test-{os.getpid()}"
    status = fed.status()

    def pane() -> str:
        done = subprocess.run([tmux, "-L", sock, "capture-pane", "-p", "-t", "watch"], capture_output=True, text=True)
        return done.stdout

    cmd = f"oddsmill watch --http {fed.server.bound['http']} --interval 0.5"
    subprocess.run([tmux, "-L", sock, "new-session", "-d", "-s", "watch", "-x", "110", "-y", "60", cmd], check=True)
    try:
        screen = wait_for("the watch screen", lambda: (s := pane()) and f"step {status['step']:,}" in s and s)
        assert "healthy" in screen and "NOT HEALTHY" not in screen
        assert f"recent {status['log_loss_window']:.4f}" in screen
        assert f"since start {status['log_loss']:.4f}" in screen
        assert f"calibration error {status['calibration_error_window']:.4f}" in screen
        spark = next(
            line for line in screen.splitlines() if line.startswith("  ") and set(line.strip()) <= set("▁▂▃▄▅▆▇█ ")
        )
        assert len(spark.strip()) >= 10
        top = status["coefficients"][0]
        assert top["feature"] in screen
        # Ctrl-C ends it cleanly: the session closes with the program
        subprocess.run([tmux, "-L", sock, "send-keys", "-t", "watch", "C-c"], check=True)
        wait_for(
            "watch to exit on Ctrl-C",
            lambda: (
                subprocess.run([tmux, "-L", sock, "has-session", "-t", "watch"], capture_output=True).returncode != 0
            ),
            timeout=10,
        )
    finally:
        subprocess.run([tmux, "-L", sock, "kill-server"], capture_output=True)


def test_watch_once_against_no_daemon_says_so_and_fails() -> None:
    done = subprocess.run(
        ["oddsmill", "watch", "--once", "--http", f"127.0.0.1:{free_port()}"],
        capture_output=True,
        text=True,
        timeout=30,
    )
    assert done.returncode == 1
    assert "not answering" in done.stderr
    assert "trying again" not in done.stderr  # (--once does not)


# -- the report ----------------------------------------------------------------------------------------
def test_report_renders_a_checkpoint_self_contained_with_a_png(tmp_path: Path) -> None:
    state = tmp_path / "state"
    assert run_cli("replay", str(DEMO), "--state", str(state))[0] == 0
    out = tmp_path / "review.html"
    code, said = run_cli("report", str(state), "--out", str(out), "--png")
    assert code == 0, said
    html = out.read_text()
    for outside in ("src=", "href=", "http://", "https://", "@import"):  # nothing fetched from elsewhere
        assert outside not in html.replace("http://www.w3.org/2000/svg", ""), outside
    inspected = json.loads(run_cli("inspect", str(state), "--json")[1])

    dom = chromium(out.as_uri(), "--dump-dom", user_data=tmp_path / "profile")
    page = Page()
    page.feed(dom)
    m = inspected["metrics"]
    assert page.body["data-state"] == "report"
    assert int(page.body["data-step"]) == inspected["step"]
    for key in ("log_loss", "log_loss_window", "brier_window", "calibration_error_window", "learning_rate"):
        assert float(page.figures[key]) == m[key], key
    assert int(page.figures["log_loss_count"]) == m["log_loss_count"]
    for tile in ("Journal on disk", "Free on the state's disk"):  # a live daemon's figures, not a checkpoint's
        assert f'<div hidden=""><dt>{tile}</dt>' in dom, tile
    assert page.series["since start"] > 50
    assert [b["data-feature"] for b in page.bars] == [c["feature"] for c in inspected["coefficients"][:12]]
    # the demo's sparse bands near 0.5 lie close together: each gets its count, some left of or below
    # its circle, none crossing another (written at the right of each, they crossed)
    assert counts_apart(page, [b["count"] for b in m["calibration_bins"] if b["count"]]) == 0
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    chromium(
        out.as_uri(), "--window-size=1300,1250", f"--screenshot={ARTIFACTS / 'report.png'}", user_data=tmp_path / "p2"
    )

    # the PNG: decoded, the size asked for, and not blank: both charts drew lines on it
    import matplotlib.image

    png = out.with_suffix(".png")
    image = matplotlib.image.imread(png)
    assert image.shape[:2] == (420, 1100)
    ink = image[:, :, :3].mean(axis=2) < 0.9
    left, right = ink[60:380, 60:540], ink[60:380, 600:1080]
    assert left.mean() > 0.01 and right.mean() > 0.01, (left.mean(), right.mean())
    coloured = np.abs(image[:, :, 0] - image[:, :, 2]) > 0.2  # the series are drawn in colour
    assert coloured.sum() > 1000
    (ARTIFACTS / "report-charts.png").write_bytes(png.read_bytes())


def test_the_png_gives_its_time_in_utc_and_says_why_its_chart_is_empty(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """The PNG's title gave the checkpoint's time in the machine's zone without naming it, where
    the page and `inspect` give UTC; and its log-loss chart said "no labelled events" with 1 to 49
    of them (the history takes a point every 50). Both read off the figure as it is drawn."""
    import datetime

    import matplotlib.axes
    import matplotlib.figure
    from oddsmill.cli import load_state
    from oddsmill.report import report_document, write_png

    said: list[str] = []
    real_title, real_text = matplotlib.figure.Figure.suptitle, matplotlib.axes.Axes.text
    monkeypatch.setattr(matplotlib.figure.Figure, "suptitle", lambda f, t, **k: said.append(t) or real_title(f, t, **k))
    monkeypatch.setattr(
        matplotlib.axes.Axes, "text", lambda a, x, y, t, **k: said.append(t) or real_text(a, x, y, t, **k)
    )
    monkeypatch.setenv("TZ", "Asia/Tokyo")  # (nine hours from UTC, no summer time)
    time.tzset()
    try:
        log = tmp_path / "ten.jsonl"
        log.write_text("".join(f'{{"x": {{"route_km": {i}}}, "y": {i % 2}}}\n' for i in range(10)))
        assert run_cli("replay", str(log), "--state", str(tmp_path / "s"))[0] == 0
        engine, created, race, _ = load_state(str(tmp_path / "s"))
        write_png(report_document(engine, created, "s", race), tmp_path / "r.png")
    finally:
        monkeypatch.delenv("TZ")
        time.tzset()
    when = datetime.datetime.fromtimestamp(created, datetime.UTC).strftime("%Y-%m-%d %H:%M")
    assert said == ["too few labelled events for a point yet", f"oddsmill model at step 10 (checkpoint of {when} UTC)"]


def test_report_refuses_a_bad_destination_and_a_missing_state(tmp_path: Path) -> None:
    assert run_cli("report", str(tmp_path), "--out", str(tmp_path / "r.html"))[0] == 2  # no checkpoint
    assert run_cli("report", str(tmp_path), "--out", str(tmp_path / "r.pdf"))[0] == 2
    assert run_cli("report", str(tmp_path), "--out", str(tmp_path / "nowhere" / "r.html"))[0] == 2
    assert list(tmp_path.iterdir()) == []


def test_report_to_a_directory_that_takes_no_file_is_one_line(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    """A directory that exists but cannot be written (here /proc) ended in a FileNotFoundError
    traceback."""
    log = tmp_path / "few.jsonl"
    log.write_text("".join(f'{{"x": {{"stops": {k % 5}}}, "y": {k % 2}}}\n' for k in range(50)))
    assert run_cli("replay", str(log), "--state", str(tmp_path / "s"))[0] == 0
    capsys.readouterr()
    assert run_cli("report", str(tmp_path / "s"), "--out", "/proc/oddsmill-report.html")[0] == 2
    assert capsys.readouterr().err.strip() == (
        "oddsmill: --out '/proc/oddsmill-report.html': cannot write (No such file or directory)"
    )


def test_a_report_the_disk_cannot_hold_leaves_the_earlier_one(tmp_path: Path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """On a full disk (a 100 KiB tmpfs, by hand) `report` said so in one line, but left an empty
    file where the earlier report had been. It now writes beside it and puts the file in place
    only when whole: the earlier report stays, and no part of a file is left. (The disk is
    filled here by a write that stops half way, as a full disk's does.)"""
    import errno
    import os

    log = tmp_path / "few.jsonl"
    log.write_text("".join(f'{{"x": {{"stops": {k % 5}}}, "y": {k % 2}}}\n' for k in range(50)))
    assert run_cli("replay", str(log), "--state", str(tmp_path / "s"))[0] == 0
    out = tmp_path / "r.html"
    assert run_cli("report", str(tmp_path / "s"), "--out", str(out))[0] == 0
    earlier = out.read_bytes()
    capsys.readouterr()
    real = Path.write_bytes

    def full(self: Path, data: bytes) -> int:
        real(self, data[: len(data) // 2])
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(Path, "write_bytes", full)
    assert run_cli("report", str(tmp_path / "s"), "--out", str(out))[0] == 2
    assert capsys.readouterr().err.strip() == f"oddsmill: --out {str(out)!r}: cannot write (No space left on device)"
    assert out.read_bytes() == earlier
    assert sorted(p.name for p in tmp_path.iterdir()) == ["few.jsonl", "r.html", "s"]


def test_watch_says_why_the_life_chart_is_empty() -> None:
    """Until the first point of the log-loss history (50 labelled events), the chart's line said
    "no labelled events yet" even with some: it now tells the two apart."""
    from oddsmill.engine import Engine
    from oddsmill.learner import Learner
    from oddsmill.metrics import Snapshot, status_document
    from oddsmill.protocol import decode_body
    from oddsmill.watch import render

    engine = Engine(Learner())

    def life_line(labelled: int) -> str:
        doc = status_document(Snapshot.of(engine, last_checkpoint=0.0), now=0.0)
        assert doc["log_loss_count"] == labelled
        return next(line for line in render(doc, "here").splitlines() if "over the model's life" in line)

    assert life_line(0).endswith(": no labelled events yet")
    engine.process([(0.0, item) for item in decode_body({"x": {"route_km": 3.0}, "y": 1})])
    assert life_line(1).endswith(": too few labelled events for a point yet")
    for i in range(49):
        engine.process([(0.0, item) for item in decode_body({"x": {"route_km": float(i)}, "y": i % 2})])
    assert "(" in life_line(50) and "up means worse" in life_line(50)  # the first point: a sparkline follows


def test_a_report_of_a_few_labelled_events_says_why_its_chart_is_empty(tmp_path: Path) -> None:
    """The dashboard's log-loss chart (here in a report, the same page) before its first point."""
    log = tmp_path / "few.jsonl"
    log.write_text("".join(json.dumps({"x": {"route_km": float(i)}, "y": i % 2}) + "\n" for i in range(10)))
    state = tmp_path / "state"
    assert run_cli("replay", str(log), "--state", str(state))[0] == 0
    out = tmp_path / "few.html"
    assert run_cli("report", str(state), "--out", str(out))[0] == 0
    dom = chromium(out.as_uri(), "--dump-dom", user_data=tmp_path / "profile")
    chart = _chart(dom, "chart-logloss")
    assert "too few labelled events for a point yet" in chart and "no labelled events yet" not in chart
    # when the checkpoint was written, in the form and zone of the page's own tile for it (it was the
    # browser's local time as day/month/year: 05/12/2026, a date a reader elsewhere takes for 12 May)
    import datetime
    import re

    written = float(re.search(r'"written": ([0-9.]+)', out.read_text()).group(1))
    when = datetime.datetime.fromtimestamp(written, datetime.UTC).strftime("%Y-%m-%d %H:%M:%S")
    assert f"checkpoint written {when} UTC</" in dom


def test_the_rates_chart_of_one_second_has_no_time_to_come(tmp_path: Path) -> None:
    """A daemon's first second gives the events/s chart one sample: the axis ran from before it to
    after now ("-0.2 seconds ago"). One point now sits at the axis' right end."""
    import re

    from oddsmill.engine import Engine
    from oddsmill.learner import Learner
    from oddsmill.report import report_document, write_html

    doc = report_document(Engine(Learner()), created=1000.0, source="a test")
    doc["rates"] = [[999.3, 5800.0, 0.0, 0.0]]  # (time, train/s, score/s, outcome/s), 0.7 s before the figures
    out = tmp_path / "rates.html"
    write_html(doc, out)
    dom = chromium(out.as_uri(), "--dump-dom", user_data=tmp_path / "profile")
    chart = _chart(dom, "chart-rates")
    ticks = [float(t) for t in re.findall(r'text-anchor="middle">(-?[0-9.]+)</text>', chart)]
    assert ticks and min(ticks) >= 0.0, ticks


def test_watch_shows_a_race() -> None:
    """`watch` showed a race's serving candidate's figures and nothing of the race: which
    candidates there are, how each does, which one serves, and the last switch, as the
    dashboard's race panel shows them."""
    from oddsmill.metrics import Snapshot, status_document
    from oddsmill.race import Race
    from oddsmill.watch import render

    from tests.test_race import SPEEDS, blocks, drifting

    race = Race(SPEEDS, window=1000, patience=500)
    for block in blocks(drifting(6_000, change=3_000, seed=5), 200):
        race.process(block)
    assert race.switches
    doc = status_document(Snapshot.of(race.engine, last_checkpoint=0.0, race=race), now=0.0)
    lines = render(doc, "here").splitlines()
    at = lines.index(f"{'race of 3 candidates':<35}recent log-loss   since start   (* serves)")
    rows = [line.split() for line in lines[at + 1 : at + 4]]
    shown = next(c for c in doc["candidates"] if c["serving"])
    assert shown["name"] == race.names[race.serving]
    assert [r for r in rows if r[0] == "*"] == [
        ["*", shown["name"], f"{shown['log_loss_window']:.4f}", f"{shown['log_loss']:.4f}"]
    ]
    windows = [float(r[-2]) for r in rows]
    assert windows == sorted(windows) and {r[-3] for r in rows} == set(race.names)
    last = race.switches[-1]
    assert lines[at + 4] == (
        f"{len(race.switches)} switch{'es' if len(race.switches) > 1 else ''}; last at labelled event "
        f"{last['at']:,}: {last['from']} -> {last['to']}"
    )


def _chart(dom: str, ident: str) -> str:
    """The markup of the page's chart `ident` (its svg element), from a dumped DOM."""
    chart = dom[dom.index(f'id="{ident}"') :]
    return chart[: chart.index("</svg>")]


def test_the_race_chart_keeps_every_candidates_label_inside_it(tmp_path: Path) -> None:
    """The race chart's lines end in a label each (name, recent log-loss). They were only pushed
    down, away from each other: the twelve candidates of the auto grid, ending close together on
    the demo's log, wrote half their labels below the chart's foot, where the svg cut them off
    (the serving one's among them), in a panel a third of the page wide. The panel is as wide as
    the page now, and the labels stay inside the chart, 13 units apart, each within its width (a
    character about 6.5 units wide at the page's 11 units). Four lines shared each of the three
    styles; each has its own now."""
    require("chromium")
    import gzip

    from oddsmill.protocol import decode_body
    from oddsmill.race import Race, auto_candidates
    from oddsmill.report import report_document, write_html
    from oddsmill.settings import LearnerSettings

    race = Race(auto_candidates(LearnerSettings()))
    with gzip.open(DEMO, "rt") as f:
        bodies = [json.loads(line) for line in f][:20_000]
    for lo in range(0, len(bodies), 500):
        race.process([(0.0, item) for body in bodies[lo : lo + 500] for item in decode_body(body)])
    out = tmp_path / "race.html"
    write_html(report_document(race.engine, created=1000.0, source="a test", race=race), out)
    page = Page()
    page.feed(chromium(out.as_uri(), "--dump-dom", user_data=tmp_path / "profile"))
    width, height = 1000, 280  # the race chart's viewBox
    labels = [label for label in page.end_labels if label[2].startswith("eta0=")]
    assert len(labels) == 12, page.end_labels
    assert sum("(serving)" in text for _, _, text in labels) == 1
    ys = sorted(y for _, y, _ in labels)
    assert 12 <= ys[0] and ys[-1] <= height - 4, ys
    assert all(b - a >= 13 for a, b in zip(ys, ys[1:], strict=False)), ys
    assert all(x + 6.5 * len(text) <= width for x, _, text in labels), labels
    # and each line is drawn in a style of its own (three colours by four patterns): with a pattern
    # for each colour, lines 0, 3, 6 and 9 were alike
    styles = [style for name, style in page.styles.items() if name.startswith("eta0=")]
    assert len(styles) == 12 and len(set(styles)) == 12, page.styles


def test_the_rates_chart_of_an_idle_daemon_labels_each_tick_once(tmp_path: Path) -> None:
    """An idle daemon's events/s are all 0: the axis runs from 0 to 1 in steps of 0.2, and its
    ticks, written without decimals, read 0, 0, 0, 1, 1, 1 (seen on a restarted daemon's page)."""
    import re

    from oddsmill.engine import Engine
    from oddsmill.learner import Learner
    from oddsmill.report import report_document, write_html

    doc = report_document(Engine(Learner()), created=1000.0, source="a test")
    doc["rates"] = [[990.0 + k, 0.0, 0.0, 0.0] for k in range(10)]  # (time, train/s, score/s, outcome/s)
    out = tmp_path / "idle.html"
    write_html(doc, out)
    chart = _chart(chromium(out.as_uri(), "--dump-dom", user_data=tmp_path / "profile"), "chart-rates")
    ticks = re.findall(r'text-anchor="end">([^<]+)</text>', chart)
    assert len(ticks) >= 3 and len(set(ticks)) == len(ticks), ticks
