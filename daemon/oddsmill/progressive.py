"""Progressive validation metrics: each labelled event is scored before it is learned.

Kept per block, not per event: `update` takes arrays. The state (sums and the window's ring buffer)
goes into checkpoints so that metrics resume exactly.

>>> m = ProgressiveMetrics(window=4)
>>> m.update(np.array([0.0, 0.0]), np.array([1.0, 0.0]))
>>> round(m.log_loss, 6)   # log(2)
0.693147
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any, Generic, TypeVar

import numpy as np
from numba import njit

CALIBRATION_BINS = 10
HISTORY_POINTS = 512  # the history keeps at most this many points, thinning itself as it grows
HISTORY_STRIDE = 50  # labelled events between two points, at first
LOG2 = math.log(2.0)
CHUNK = 64  # ring slots summed together for the window's log-loss (see _window_sum)
_NO_P = np.empty(0)  # `_record` without the probabilities


def log_loss_from_logit(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """-[y log p + (1 - y) log(1 - p)] with p = sigmoid(z), computed stably from z."""
    out: np.ndarray = np.logaddexp(0.0, z) - y * z
    return out


@njit(cache=True)
def _softplus(z: float) -> float:
    """log(1 + e^z), as numpy's logaddexp(0, z) computes it, bit for bit (the same branches and C
    library calls; test_progressive holds the two equal)."""
    if z > 0.0:
        return z + math.log1p(math.exp(-z))
    if z < 0.0:
        return math.log1p(math.exp(z))
    return LOG2 if z == 0.0 else z


@njit(cache=True, inline="always")
def _softplus_and_p(z: float) -> tuple[float, float]:
    """(`_softplus(z)`, sigmoid(z)) from one exp, each bit for bit what `_softplus` and a score's
    p (`quick._p`) compute: both take exp(-|z|), and a columnar block's body needs both."""
    if z > 0.0:
        e = math.exp(-z)
        return z + math.log1p(e), 1.0 / (1.0 + e)
    if z < 0.0:
        e = math.exp(z)
        return math.log1p(e), e / (1.0 + e)
    if z == 0.0:
        return LOG2, 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)  # NaN
    return z, e / (1.0 + e)


@njit(cache=True)
def _losses(z: np.ndarray, y: np.ndarray) -> np.ndarray:
    out = np.empty(z.shape[0])
    for i in range(z.shape[0]):
        out[i] = _softplus(z[i]) - y[i] * z[i]
    return out


@njit(cache=True)
def _window_sum(ll: np.ndarray, chunks: np.ndarray, dirty: np.ndarray) -> float:
    """The sum of the ring `ll`: each chunk of CHUNK slots summed in order (again only if written
    to since), then the chunks' sums in order. A function of the ring's contents alone, so the
    figure does not depend on the blocks that filled it."""
    n = ll.shape[0]
    total = 0.0
    for c in range(chunks.shape[0]):
        if dirty[c]:
            s = 0.0
            for i in range(c * CHUNK, min(n, (c + 1) * CHUNK)):
                s += ll[i]
            chunks[c] = s
            dirty[c] = False
        total += chunks[c]
    return total


@njit(cache=True)
def _thin(history: np.ndarray) -> None:
    """Keep every other point (the second, fourth, ...) at the front of a full history."""
    for j in range(history.shape[0] // 2):
        history[j] = history[2 * j + 1]


@njit(cache=True)
def _record(
    z: np.ndarray,
    y: np.ndarray,
    rz: np.ndarray,
    ry: np.ndarray,
    rll: np.ndarray,
    chunks: np.ndarray,
    dirty: np.ndarray,
    history: np.ndarray,
    total: float,
    count: int,
    head: int,
    filled: int,
    stride: int,
    points: int,
    p: np.ndarray,
) -> tuple[float, int, int, int, int, int]:
    """`ProgressiveMetrics.update`, compiled: each event's loss added to the sum in order and
    written to the ring, a history point at every multiple of the stride. One path for blocks of
    every size: a call costs 1.6 us, about what a block of one cost with Python floats. (With
    numpy, the window's mean over 10,000 values at each of a block's ten history points took most
    of the metrics' 73 us a block of 500: more than the kernel, and nine times over in a race.)
    When p is not empty, each event's p (its score's) goes there too, from the loss's exp."""
    w = rz.shape[0]
    with_p = p.shape[0] > 0
    for i in range(z.shape[0]):
        zi = z[i]
        yi = y[i]
        if with_p:
            sp, p[i] = _softplus_and_p(zi)
        else:
            sp = _softplus(zi)
        ll = sp - yi * zi
        total += ll
        count += 1
        rz[head] = zi
        ry[head] = yi
        rll[head] = ll
        dirty[head // CHUNK] = True
        head += 1
        if head == w:
            head = 0
        if filled < w:
            filled += 1
        if count % stride == 0:
            history[points, 0] = count
            history[points, 1] = total / count
            history[points, 2] = _window_sum(rll, chunks, dirty) / filled
            points += 1
            if points >= history.shape[0]:
                _thin(history)
                points = history.shape[0] // 2
                stride *= 2
    return total, count, head, filled, stride, points


def sigmoid(z: np.ndarray) -> np.ndarray:
    out: np.ndarray = np.exp(-np.logaddexp(0.0, -z))
    return out


T = TypeVar("T", int, float)


class _Scalar(Generic[T]):
    """One of ProgressiveMetrics' scalars, kept in its `_ms` array and read as an int or a float."""

    def __init__(self, index: int, kind: Callable[[float], T]) -> None:
        self.index = index
        self.kind: Callable[[float], T] = kind

    def __get__(self, obj: ProgressiveMetrics, owner: type | None = None) -> T:
        return self.kind(float(obj._ms[self.index]))

    def __set__(self, obj: ProgressiveMetrics, value: T) -> None:
        obj._ms[self.index] = value


class ProgressiveMetrics:
    """Progressive log-loss since the state was created, and log-loss, Brier score and expected
    calibration error over the last `window` labelled events."""

    sum = _Scalar(0, float)  # the log-loss summed over every labelled event
    count = _Scalar(1, int)  # labelled events recorded
    _head = _Scalar(2, int)  # where the ring's next value goes
    _filled = _Scalar(3, int)  # values in the ring
    stride = _Scalar(4, int)  # labelled events between two history points
    _points = _Scalar(5, int)  # history points kept

    def __init__(self, window: int = 10_000) -> None:
        self.window = window
        # `_record`'s scalars, kept as the array its compiled callers update in place (quick.py):
        # sum, count, head, filled, stride, points (counts held exactly: below 2**53)
        self._ms = np.zeros(6)
        self._z = np.zeros(window)
        self._y = np.zeros(window)
        self._ll = np.zeros(window)  # the log-loss of each, so a history point costs one sum
        # the window's log-loss is the sum of the sums of CHUNK ring slots, in ring order; a chunk
        # written to since its sum was taken is summed again (in order) when a figure is asked for
        chunks = (window + CHUNK - 1) // CHUNK
        self._chunks = np.zeros(chunks)
        self._dirty = np.zeros(chunks, dtype=np.bool_)
        # figures of the window kept until the count changes (the window changes only with it):
        # a race asks for every candidate's log-loss after each block, a history point asks at the
        # same count, and the loop takes its figures when a scrape asks
        self._kept_at = -1
        self._kept: dict[str, Any] = {}
        # (labelled events so far, progressive log-loss, windowed log-loss) every `stride` labelled
        # events. Taken at exact counts, not at block ends, so a restarted daemon that replays its
        # journal in other blocks has the same history. When full, every other point is dropped and
        # the stride doubles: the whole life of the model stays in view at a coarser grain.
        self._history = np.zeros((HISTORY_POINTS, 3))
        self.stride = HISTORY_STRIDE
        self._one_z = np.zeros(1)  # update_one's arrays
        self._one_y = np.zeros(1)

    @property
    def history(self) -> list[tuple[int, float, float]]:
        return [(int(c), a, b) for c, a, b in self._history[: self._points].tolist()]

    def update(self, z: np.ndarray, y: np.ndarray, p: np.ndarray | None = None) -> None:
        """Record the published logits `z` of labelled events with outcomes `y`, in order; with
        `p`, each one's p (its score's, bit for bit) goes there as well."""
        n = z.shape[0]
        if not n:
            return
        ms = self._ms
        ms[0], ms[1], ms[2], ms[3], ms[4], ms[5] = _record(
            z,
            y,
            self._z,
            self._y,
            self._ll,
            self._chunks,
            self._dirty,
            self._history,
            ms[0],
            int(ms[1]),
            int(ms[2]),
            int(ms[3]),
            int(ms[4]),
            int(ms[5]),
            _NO_P if p is None else p,
        )

    def arrays(self) -> tuple[np.ndarray, ...]:
        """The arrays `_record` updates, for compiled callers that record themselves (quick.py)."""
        return (self._z, self._y, self._ll, self._chunks, self._dirty, self._history)

    def scalars(self) -> np.ndarray:
        """`_record`'s scalars (sum, count, head, filled, stride, points): the array the metrics
        keep them in, for compiled callers to update in place (quick.py)."""
        return self._ms

    def update_one(self, z: float, y: float) -> None:
        """`update` with one labelled event (its arrays are kept, not built a call)."""
        self._one_z[0] = z
        self._one_y[0] = y
        self.update(self._one_z, self._one_y)

    def _recent(self) -> tuple[np.ndarray, np.ndarray]:
        return self._z[: self._filled], self._y[: self._filled]

    @property
    def log_loss(self) -> float:
        return self.sum / self.count if self.count else float("nan")

    @property
    def log_loss_window(self) -> float:
        value: float = self._keep("log_loss", self._mean_log_loss)
        return value

    def _mean_log_loss(self) -> float:
        return _window_sum(self._ll, self._chunks, self._dirty) / self._filled if self._filled else float("nan")

    def _keep(self, name: str, compute: Any) -> Any:
        """`compute()`, once a count (see `_kept`)."""
        if self._kept_at != self.count:
            self._kept.clear()
            self._kept_at = self.count
        if name not in self._kept:
            self._kept[name] = compute()
        return self._kept[name]

    @property
    def brier_window(self) -> float:
        p, _ = self._window_figures()
        return float(np.mean((p - self._recent()[1]) ** 2)) if p.size else float("nan")

    def calibration_bins(self) -> list[dict[str, float]]:
        """Equal-width bins of the predicted probability over the window: count, mean predicted,
        observed rate (a reliability diagram's points)."""
        return [dict(b) for b in self._window_figures()[1]]

    def _window_figures(self) -> tuple[np.ndarray, list[dict[str, float]]]:
        """The window's probabilities and calibration bins, once a count: computing the
        probabilities three times and the bins twice at each refresh (1.5 ms) stalled the scores."""
        figures: tuple[np.ndarray, list[dict[str, float]]] = self._keep("figures", self._compute_figures)
        return figures

    def _compute_figures(self) -> tuple[np.ndarray, list[dict[str, float]]]:
        z, y = self._recent()
        p = sigmoid(z)
        b = np.minimum((p * CALIBRATION_BINS).astype(int), CALIBRATION_BINS - 1)
        out = []
        for k in range(CALIBRATION_BINS):
            sel = b == k
            n = int(sel.sum())
            out.append(
                {
                    "low": k / CALIBRATION_BINS,
                    "high": (k + 1) / CALIBRATION_BINS,
                    "count": n,
                    "mean_predicted": float(p[sel].mean()) if n else float("nan"),
                    "observed_rate": float(y[sel].mean()) if n else float("nan"),
                }
            )
        return p, out

    @property
    def calibration_error_window(self) -> float:
        """Expected calibration error: sum over bins of (bin share) x |observed - predicted|."""
        total = self._filled
        if not total:
            return float("nan")
        return float(
            sum(
                b["count"] / total * abs(b["observed_rate"] - b["mean_predicted"])
                for b in self._window_figures()[1]
                if b["count"]
            )
        )

    def summary(self) -> dict[str, float]:
        return {
            "log_loss": self.log_loss,
            "log_loss_count": float(self.count),
            "log_loss_window": self.log_loss_window,
            "brier_window": self.brier_window,
            "calibration_error_window": self.calibration_error_window,
        }

    def state_dict(self) -> dict[str, Any]:
        """The ring buffer as it lies (not reordered), so that a restored window sums its values in
        the same order and gives bit-identical figures."""
        return {
            "window": self.window,
            "sum": self.sum,
            "count": self.count,
            "head": self._head,
            "filled": self._filled,
            "z": self._z[: self._filled].copy(),
            "y": self._y[: self._filled].copy(),
            "history": self._history[: self._points].copy(),
            "stride": self.stride,
        }

    @classmethod
    def from_state_dict(cls, d: dict[str, Any]) -> ProgressiveMetrics:
        m = cls(int(d["window"]))
        n = int(d["filled"])
        m._z[:n] = np.asarray(d["z"], dtype=np.float64)
        m._y[:n] = np.asarray(d["y"], dtype=np.float64)
        m._ll[:n] = _losses(m._z[:n], m._y[:n])
        m._dirty[:] = True
        m._filled, m._head = n, int(d["head"])
        m.sum, m.count = float(d["sum"]), int(d["count"])
        if "history" in d:  # checkpoints written before the history was kept have none
            points = np.asarray(d["history"], dtype=np.float64).reshape(-1, 3)
            m._history[: len(points)] = points
            m._points = len(points)
            m.stride = int(d["stride"])
        return m
