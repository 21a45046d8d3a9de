"""`oddsmill report`: the dashboard of a checkpoint as one self-contained HTML file, for a review.

The page is the daemon's own dashboard with the status document of the checkpoint embedded, so it
shows the same figures and charts (but events/s, which a checkpoint does not record) and needs no
daemon and no network. `--png` also draws the log-loss and reliability charts into a PNG with
matplotlib (the optional `report` extra), for documents that cannot hold a web page.
"""

from __future__ import annotations

import json
import os
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from .engine import Engine
from .errors import UsageError
from .metrics import Snapshot, dashboard_page, status_document
from .watch import no_points

MARKER = b'<script>\n"use strict";'


def report_document(engine: Engine, created: float, source: str, race: Any = None) -> dict[str, Any]:
    """The /api/status document of a model at rest, as of when its checkpoint was written."""
    doc = status_document(Snapshot.of(engine, last_checkpoint=created, race=race), now=created)
    doc["time"] = created
    doc["report"] = {"source": source, "written": created}
    return doc


def write_html(doc: dict[str, Any], out: Path) -> None:
    page = dashboard_page()
    if MARKER not in page:
        raise AssertionError("the dashboard page has lost the marker the report inserts its data before")
    # "</" cannot appear inside a script element, so the JSON escapes it
    data = json.dumps(doc).replace("</", "<\\/").encode()
    embedded = b"<script>window.ODDSMILL_STATUS = " + data + b";</script>\n"
    page = page.replace(MARKER, embedded + MARKER, 1)
    _write_whole(out, lambda tmp: tmp.write_bytes(page))


def _write_whole(out: Path, write: Callable[[Path], object]) -> None:
    """`write` a file beside `out`, then put it in `out`'s place: a failure (a full disk) leaves
    no part of a file, and an earlier report at `out` as it was."""
    tmp = out.with_name(f".{out.name}.tmp")
    try:
        write(tmp)
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)


def write_png(doc: dict[str, Any], out: Path) -> None:
    """The log-loss history and the reliability diagram, side by side, as a PNG."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise UsageError(
            "--png draws with matplotlib, which is not installed: pip install 'oddsmill[report]'"
        ) from None
    fig, (a, b) = plt.subplots(1, 2, figsize=(11, 4.2), dpi=100)
    hist = doc["history"]
    if hist:
        x = [h[0] for h in hist]
        a.plot(x, [h[1] for h in hist], "-", marker="o", markevery=max(1, len(x) // 12), label="since start")
        a.plot(x, [h[2] for h in hist], "--", marker="s", markevery=max(1, len(x) // 12), label="recent window")
        a.legend()
    else:
        a.text(0.5, 0.5, no_points(doc), ha="center", transform=a.transAxes)
    a.set_xlabel("labelled events")
    a.set_ylabel("log-loss (nats)")
    a.set_title("Log-loss as the model learned")
    a.grid(alpha=0.3)
    bins = [k for k in doc["calibration_bins"] if k["count"]]
    b.plot([0, 1], [0, 1], ":", color="grey", label="perfect calibration")
    if bins:
        most = max(k["count"] for k in bins)
        b.plot([k["mean_predicted"] for k in bins], [k["observed_rate"] for k in bins], "-", color="C0")
        b.scatter(
            [k["mean_predicted"] for k in bins],
            [k["observed_rate"] for k in bins],
            s=[20 + 200 * k["count"] / most for k in bins],
            alpha=0.5,
            label="band (area: events)",
        )
        for k in bins:
            b.annotate(
                f"{k['count']:,}",
                (k["mean_predicted"], k["observed_rate"]),
                xytext=(6, -3),
                fontsize=8,
                textcoords="offset points",
            )
    b.set_xlim(0, 1)
    b.set_ylim(0, 1)
    b.set_xlabel("predicted probability (mean in band)")
    b.set_ylabel("observed rate")
    b.set_title("Reliability of the recent window")
    b.legend(loc="upper left")
    b.grid(alpha=0.3)
    written = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime(doc["report"]["written"]))
    fig.suptitle(f"oddsmill model at step {doc['step']:,} (checkpoint of {written})")
    fig.tight_layout()
    try:
        _write_whole(out, lambda tmp: fig.savefig(tmp, format="png"))
    finally:
        plt.close(fig)
