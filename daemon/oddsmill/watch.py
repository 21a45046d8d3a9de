"""`oddsmill watch`: the dashboard's figures in a terminal, for someone on a remote shell.

Polls the daemon's /api/status and redraws one screen of plain text: health, the log-loss figures,
a sparkline of the recent window's log-loss over the model's life, events/s by kind, the
reliability bands and the strongest features. Only the standard library: it runs wherever the
daemon does, and over any terminal.

>>> sparkline([3.0, 1.0, 2.0, None, 4.0])
'▆▁▃ █'
>>> sparkline([0.5, 0.5])
'▅▅'
"""

from __future__ import annotations

import json
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Sequence
from typing import Any, TextIO

BARS = "▁▂▃▄▅▆▇█"
CLEAR = "\x1b[H\x1b[2J"  # cursor home, clear screen


def sparkline(values: Sequence[float | None]) -> str:
    """One character a value, its height the value's place between the least and the greatest;
    a missing value is a blank."""
    known = [v for v in values if v is not None]
    if not known:
        return ""
    lo, hi = min(known), max(known)
    span = hi - lo
    out = []
    for v in values:
        if v is None:
            out.append(" ")
        elif span == 0:
            out.append(BARS[len(BARS) // 2])
        else:
            out.append(BARS[min(len(BARS) - 1, int((v - lo) / span * len(BARS)))])
    return "".join(out)


def _f(v: float | None, digits: int = 4) -> str:
    return "–" if v is None else f"{v:.{digits}f}"


def _n(v: float | None) -> str:
    return "–" if v is None else f"{round(v):,}"


def _age(s: float | None) -> str:
    if s is None:
        return "never"
    if s < 90:
        return f"{s:.0f} s ago"
    if s < 5400:
        return f"{s / 60:.0f} min ago"
    return f"{s / 3600:.1f} h ago"


def _thin(values: list[float | None], width: int) -> list[float | None]:
    """At most `width` values, evenly picked, the last always kept."""
    if len(values) <= width:
        return values
    step = len(values) / width
    return [values[min(len(values) - 1, int((k + 1) * step) - 1)] for k in range(width)]


def no_points(doc: dict[str, Any]) -> str:
    """What an empty history means: no labelled event, or too few yet for its first point."""
    return "too few labelled events for a point yet" if doc.get("log_loss_count") else "no labelled events yet"


def render(doc: dict[str, Any], where: str, width: int = 100) -> str:
    """One screen of the figures in `doc` (an /api/status document)."""
    lines = []
    health = "healthy" if doc.get("healthy") else "NOT HEALTHY (stuck, or cannot write its state)"
    lines.append(f"oddsmill at {where}   {health}   step {_n(doc['step'])}   up {_age(doc.get('uptime_seconds'))[:-4]}")
    lines.append("")
    lines.append(
        f"log-loss   recent {_f(doc['log_loss_window'])}   since start {_f(doc['log_loss'])}   "
        f"(nats per labelled event, {_n(doc['log_loss_count'])} scored)"
    )
    lines.append(
        f"recent     Brier {_f(doc['brier_window'])}   calibration error {_f(doc['calibration_error_window'])}"
    )
    hist = doc.get("history") or []
    spark = sparkline(_thin([h[2] for h in hist], max(10, width - 30)))
    if hist:
        window = [h[2] for h in hist if h[2] is not None]
        lines.append(
            f"recent log-loss over the model's life ({_f(min(window), 3)} to {_f(max(window), 3)}; up means worse):"
        )
        lines.append(f"  {spark}")
    else:  # (a point is taken every HISTORY_STRIDE labelled events, progressive.py)
        lines.append(f"recent log-loss over the model's life: {no_points(doc)}")
    rates = doc.get("rates") or []
    if rates:
        _, train, score, outcome = rates[-1]
        lines.append(
            f"events/s   training {_n(train)}   scoring {_n(score)}   outcomes {_n(outcome)}   (over the last second)"
        )
    rejected = sum((doc.get("rejected") or {}).values())
    ignored = doc.get("features_ignored") or 0
    lines.append(
        f"rejected {_n(rejected)}   lost {_n(doc.get('lost'))}   awaiting an outcome "
        f"{_n(doc['pending_outcomes'])}   features {_n(doc['features'])}"
        + (f" (vocabulary full: {_n(ignored)} values of new names ignored)" if ignored else "")
    )
    lines.append(
        f"learning rate {_f(doc['learning_rate'])}   last checkpoint {_age(doc.get('checkpoint_age_seconds'))}"
    )
    bins = [b for b in doc.get("calibration_bins") or [] if b["count"]]
    if bins:
        lines.append("")
        lines.append("reliability of recent scores   band        predicted  observed    events")
        for b in bins:
            lines.append(
                f"{'':31}{b['low']:.1f}-{b['high']:.1f}     {_f(b['mean_predicted'], 3):>9}  "
                f"{_f(b['observed_rate'], 3):>8}  {_n(b['count']):>8}"
            )
    coefs = doc.get("coefficients") or []
    if coefs:
        lines.append("")
        lines.append("strongest features (change in log-odds for a typical change; + raises the probability)")
        most = max(abs(c["effect"]) for c in coefs) or 1.0
        for c in coefs:
            bar = "█" * max(1, round(abs(c["effect"]) / most * 20))
            sign = "+" if c["effect"] >= 0 else "-"
            lines.append(f"  {c['feature'][:28]:<28} {sign}{abs(c['effect']):.2f}  {bar}")
    lines += _race(doc)
    return "\n".join(line[:width] for line in lines) + "\n"


def switches(n: int) -> str:
    """ "1 switch", "2 switches": a race's count of them, as `watch` and `inspect` say it."""
    return f"{n} switch{'' if n == 1 else 'es'}"


def _race(doc: dict[str, Any]) -> list[str]:
    """A race's candidates, the best recent log-loss first (* the one whose scores are
    published), and its last switch: the dashboard's race panel in lines."""
    candidates = doc.get("candidates") or []
    if not candidates:
        return []
    head = f"race of {len(candidates)} candidates"
    width = max(30, *(len(c["name"]) for c in candidates))  # (a name is at most 64 characters)
    lines = ["", f"{head:<{width + 5}}recent log-loss   since start   (* serves)"]  # (over their columns)
    ranked = sorted(candidates, key=lambda c: (c["log_loss_window"] is None, c["log_loss_window"] or 0.0))
    for c in ranked:
        mark = "*" if c["serving"] else " "
        lines.append(f"  {mark} {c['name']:<{width}} {_f(c['log_loss_window']):>15} {_f(c['log_loss']):>13}")
    said = doc.get("switches") or []
    if said:
        last = said[-1]
        lines.append(f"{switches(len(said))}; last at labelled event {_n(last['at'])}: {last['from']} -> {last['to']}")
    else:
        lines.append("no switch yet")
    return lines


def fetch(http: str, timeout: float = 5.0) -> dict[str, Any]:
    with urllib.request.urlopen(f"http://{http}/api/status", timeout=timeout) as r:
        doc: dict[str, Any] = json.load(r)
    return doc


def watch(http: str, interval: float, once: bool, out: TextIO = sys.stdout) -> int:
    """Redraw every `interval` seconds until interrupted; `once` prints one screen and returns."""
    tty = out.isatty()
    while True:
        width = 100
        if tty:
            import shutil

            width = shutil.get_terminal_size((100, 40)).columns
        try:
            screen = render(fetch(http), http, width)
        except (urllib.error.URLError, OSError, ValueError) as e:
            reason = getattr(e, "reason", e)
            if once:
                print(f"oddsmill at {http}: not answering ({reason})", file=sys.stderr)
                return 1
            screen = f"oddsmill at {http}: not answering ({reason}); trying again every {interval:g} s\n"
        if once:
            out.write(screen)
            return 0
        out.write((CLEAR if tty else "") + screen + ("" if tty else "\n"))
        out.flush()
        try:
            time.sleep(interval)
        except KeyboardInterrupt:
            return 0
