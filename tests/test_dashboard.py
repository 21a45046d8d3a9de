"""The dashboard in a real browser: Debian's Chromium loads the page from a daemon fed the parcel demo
stream; the figures it renders must equal /api/status, and its charts must hold the data points."""

from __future__ import annotations

import struct
from collections.abc import Iterator
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import FedDaemon
from tests.tools import ARTIFACTS, chromium, require


class Page(HTMLParser):
    """The attributes the page's script leaves on what it drew."""

    def __init__(self) -> None:
        super().__init__()
        self.body: dict[str, str] = {}
        self.figures: dict[str, str] = {}
        self.series: dict[str, int] = {}
        self.styles: dict[str, str] = {}  # a series' colour and pattern, "colour.pattern"
        self.bins: list[dict[str, str]] = []
        self.bars: list[dict[str, str]] = []
        self.bin_counts: list[tuple[float, float, str]] = []  # (x, y, text) of the counts beside the bins
        self._count_at: tuple[float, float] | None = None
        self.calibration_key: tuple[float, float] | None = None  # where "perfect calibration" is written
        self.end_labels: list[tuple[float, float, str]] = []  # (x, y, text) of the lines' end labels
        self._end_at: tuple[float, float] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        a = {k: v or "" for k, v in attrs}
        if tag == "body":
            self.body = a
        if "data-figure" in a:
            self.figures[a["data-figure"]] = a.get("data-value", "")
        if "data-series" in a:
            self.series[a["data-series"]] = int(a["data-n"])
            self.styles[a["data-series"]] = a.get("data-style", "")
        if "bin" in a.get("class", "").split():
            self.bins.append(a)
        if "bar" in a.get("class", "").split():
            self.bars.append(a)
        if "bin-count" in a.get("class", "").split():
            self._count_at = (float(a["x"]), float(a["y"]))
        if "calibration-key" in a.get("class", "").split():
            self.calibration_key = (float(a["x"]), float(a["y"]))
        if "end-label" in a.get("class", "").split():
            self._end_at = (float(a["x"]), float(a["y"]))

    def handle_data(self, data: str) -> None:
        if self._count_at is not None:
            self.bin_counts.append((*self._count_at, data))
            self._count_at = None
        if self._end_at is not None:
            self.end_labels.append((*self._end_at, data))
            self._end_at = None


def counts_apart(page: Page, counts: list[int]) -> int:
    """The counts written beside the reliability chart's bins: the largest band's among them, each
    a band's, none over another count or another band's circle (a count's box is about 7 units a
    character wide and 12 high at the page's legend size). Returns how many bands went without one."""
    labels = page.bin_counts
    assert labels and labels[0][2] == f"{max(counts):,}"
    assert {text for _, _, text in labels} <= {f"{n:,}" for n in counts}
    boxes = [(x, y - 12, x + 7 * len(text), y) for x, y, text in labels]
    circles = [
        (
            float(c["cx"]) - float(c["r"]),
            float(c["cy"]) - float(c["r"]),
            float(c["cx"]) + float(c["r"]),
            float(c["cy"]) + float(c["r"]),
        )
        for c in page.bins
    ]

    def cross(p: tuple[float, ...], q: tuple[float, ...]) -> bool:
        return p[0] < q[2] and q[0] < p[2] and p[1] < q[3] and q[1] < p[3]

    for i, box in enumerate(boxes):
        assert not any(cross(box, q) for q in boxes[:i]), f"the count {labels[i][2]} crosses another"
        # (its own circle ends 10 units before it, left of the box: crossing none is the test)
        assert not any(cross(box, c) for c in circles), f"the count {labels[i][2]} crosses a circle"
    # the diagonal's key ("perfect", then "calibration" a row below it) crosses no circle and no
    # count: it was written on the diagonal, where a calibrated model's circles and their counts lie
    assert page.calibration_key is not None
    x, y = page.calibration_key
    key = (x, y - 12, x + 7 * len("calibration"), y + 15)
    assert not any(cross(key, q) for q in [*boxes, *circles]), "the key crosses a circle or a count"
    return len(counts) - len(labels)


@pytest.fixture(scope="module")
def fed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[FedDaemon]:
    require("chromium")
    daemon = FedDaemon(tmp_path_factory.mktemp("state"))
    daemon.feed(6000)
    yield daemon
    daemon.close()


def test_the_page_shows_the_figures_of_api_status(fed: FedDaemon, tmp_path: Path) -> None:
    dom = chromium(fed.http + "/", "--dump-dom", user_data=tmp_path / "profile")
    page = Page()
    page.feed(dom)
    status: dict[str, Any] = fed.status()  # the daemon is idle: these are the figures the page read
    assert page.body["data-state"] == "live", "the page did not render a status"
    assert int(page.body["data-step"]) == status["step"] == fed.learned > 0
    f = page.figures
    for key in ("log_loss", "log_loss_window", "brier_window", "calibration_error_window", "learning_rate"):
        assert float(f[key]) == status[key], key  # JavaScript prints the shortest round-trip form
    for key in ("step", "log_loss_count", "features", "features_ignored", "pending_outcomes", "lost"):
        assert int(f[key]) == status[key], key
    assert float(f["journal_bytes"]) == status["journal_bytes"] > 0  # (whole: JavaScript prints it so)
    assert "<div><dt>Journal on disk</dt>" in dom  # shown (a report hides it)
    # read again for each snapshot, and other writers on this disk move it between two reads
    assert float(f["state_free_bytes"]) == pytest.approx(status["state_free_bytes"], abs=64 << 20)
    assert int(f["rejected_total"]) == sum(status["rejected"].values())
    assert f["healthy"] == "true"
    assert 0 <= float(f["checkpoint_age_seconds"]) <= status["uptime_seconds"]

    # the charts hold the data points
    assert page.series["since start"] == page.series["recent"] == len(status["history"]) > 50
    assert page.series["training"] >= 1 and page.series["scoring"] >= 1
    used = [b for b in status["calibration_bins"] if b["count"]]
    assert page.series["reliability"] == len(used) >= 3
    assert [int(b["data-count"]) for b in page.bins] == [b["count"] for b in used]
    for drawn, b in zip(page.bins, used, strict=True):
        assert float(drawn["data-predicted"]) == b["mean_predicted"]
        assert float(drawn["data-observed"]) == b["observed_rate"]
    counts_apart(page, [b["count"] for b in used])
    assert [b["data-feature"] for b in page.bars] == [c["feature"] for c in status["coefficients"]]
    assert len(page.bars) == min(12, status["features"])


def test_a_screenshot_of_the_page_is_saved(fed: FedDaemon, tmp_path: Path) -> None:
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    shot = ARTIFACTS / "dashboard.png"
    shot.unlink(missing_ok=True)
    chromium(fed.http + "/", "--window-size=1300,1250", f"--screenshot={shot}", user_data=tmp_path / "profile")
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = struct.unpack(">II", data[16:24])
    assert (width, height) == (1300, 1250)
    assert len(data) > 50_000, "the screenshot is nearly empty"
    print(f"screenshot: {shot}")
