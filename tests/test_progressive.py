"""Progressive metrics against scikit-learn's log_loss, brier_score_loss and calibration_curve."""

from __future__ import annotations

import numpy as np
import pytest
from oddsmill.progressive import ProgressiveMetrics, sigmoid


def test_metrics_match_scikit_learn_and_survive_a_round_trip() -> None:
    # Source: scikit-learn's sklearn.metrics.log_loss and brier_score_loss.
    from sklearn.metrics import brier_score_loss, log_loss

    rng = np.random.default_rng(4)
    z = rng.normal(0, 2, 2500)
    y = (rng.random(2500) < sigmoid(z)).astype(float)
    m = ProgressiveMetrics(window=1000)
    for lo in range(0, 2500, 333):
        m.update(z[lo : lo + 333], y[lo : lo + 333])
    assert m.log_loss == pytest.approx(log_loss(y, sigmoid(z)), rel=1e-12)
    assert m.log_loss_window == pytest.approx(log_loss(y[-1000:], sigmoid(z[-1000:])), rel=1e-12)
    assert m.brier_window == pytest.approx(brier_score_loss(y[-1000:], sigmoid(z[-1000:])), rel=1e-12)
    back = ProgressiveMetrics.from_state_dict(m.state_dict())
    assert back.log_loss_window == m.log_loss_window and back.count == m.count
    back.update(z[:10], y[:10])
    m.update(z[:10], y[:10])
    assert back.log_loss_window == m.log_loss_window


def test_calibration_error_is_zero_for_exact_probabilities_in_the_limit() -> None:
    rng = np.random.default_rng(5)
    z = rng.normal(0, 1.5, 200_000)
    y = (rng.random(z.size) < sigmoid(z)).astype(float)
    m = ProgressiveMetrics(window=200_000)
    m.update(z, y)
    assert m.calibration_error_window < 0.01
    m2 = ProgressiveMetrics(window=200_000)
    m2.update(z + 1.0, y)  # scores shifted: miscalibrated
    assert m2.calibration_error_window > 0.1


def test_reliability_bins_and_calibration_error_match_scikit_learns_calibration_curve() -> None:
    # Source: scikit-learn's sklearn.calibration.calibration_curve (strategy "uniform", 10 bins)
    # for each band's mean predicted probability and observed rate, numpy's histogram for the
    # counts; the expected calibration error is then the count-weighted mean of |observed -
    # predicted| over the bands (its usual definition; cited from memory: Naeini, Cooper and
    # Hauskrecht, AAAI 2015).
    from sklearn.calibration import calibration_curve

    rng = np.random.default_rng(7)
    z = rng.normal(-0.5, 1.8, 12_000)
    y = (rng.random(z.size) < sigmoid(0.8 * z + 0.3)).astype(float)  # miscalibrated on purpose
    m = ProgressiveMetrics(window=5000)
    for lo in range(0, z.size, 777):
        m.update(z[lo : lo + 777], y[lo : lo + 777])
    p, yw = sigmoid(z[-5000:]), y[-5000:]
    edges = np.linspace(0.0, 1.0, 11)
    assert not np.isin(p, edges).any()  # (no score on a band's edge, where conventions differ)
    observed, predicted = calibration_curve(yw, p, n_bins=10, strategy="uniform")
    counts = np.histogram(p, bins=edges)[0]
    bins = m.calibration_bins()
    assert [b["count"] for b in bins] == counts.tolist()
    used = [b for b in bins if b["count"]]
    assert len(used) == len(observed) >= 8
    assert [b["observed_rate"] for b in used] == pytest.approx(observed, rel=1e-12, abs=1e-15)
    assert [b["mean_predicted"] for b in used] == pytest.approx(predicted, rel=1e-12)
    expected_error = float(np.sum(counts[counts > 0] / 5000 * np.abs(observed - predicted)))
    assert m.calibration_error_window == pytest.approx(expected_error, rel=1e-12)
    assert expected_error > 0.02  # (the miscalibration shows)


def test_history_points_fall_at_exact_counts_whatever_the_blocks() -> None:
    # Source: scikit-learn's log_loss at each point, computed on the prefix and on the window.
    from oddsmill.progressive import HISTORY_POINTS, HISTORY_STRIDE
    from sklearn.metrics import log_loss

    rng = np.random.default_rng(6)
    n = HISTORY_STRIDE * HISTORY_POINTS * 2 + 123  # enough to thin the history twice
    z = rng.normal(0, 1.5, n)
    y = (rng.random(n) < sigmoid(z)).astype(float)
    whole = ProgressiveMetrics(window=500)
    whole.update(z, y)
    pieces = ProgressiveMetrics(window=500)
    lo = 0
    while lo < n:  # blocks of irregular sizes, with a round trip through a checkpoint midway
        size = int(rng.integers(1, 300))
        pieces.update(z[lo : lo + size], y[lo : lo + size])
        lo += size
        if lo > n // 2 and lo - size <= n // 2:
            pieces = ProgressiveMetrics.from_state_dict(pieces.state_dict())
    assert pieces.history == whole.history
    assert whole.stride == HISTORY_STRIDE * 4 and len(whole.history) < HISTORY_POINTS
    counts = [c for c, _, _ in whole.history]
    assert counts == list(range(whole.stride, n + 1, whole.stride))
    for c, progressive, window in whole.history[::40]:
        p = sigmoid(z[:c])
        assert progressive == pytest.approx(log_loss(y[:c], p, labels=[0, 1]), rel=1e-10)
        lo = max(0, c - 500)
        assert window == pytest.approx(log_loss(y[lo:c], p[lo:], labels=[0, 1]), rel=1e-10)


def test_each_events_loss_is_numpys_bit_for_bit_and_blocks_do_not_matter() -> None:
    """Each event's loss equals numpy's logaddexp(0, z) - y z (the outside reference) bit for bit,
    extremes included, and blocks of one to eight events give the same sums, window and history
    as one block, bit for bit."""
    from oddsmill.progressive import _losses

    rng = np.random.default_rng(7)
    z = np.concatenate(
        [rng.normal(0, s, 50_000) for s in (1.0, 30.0, 1e3)] + [np.array([0.0, -0.0, 5e-324, 709.0, -745.0, 1e65])]
    )
    y = (rng.random(z.size) < 0.5).astype(float)
    assert _losses(z, y).tobytes() == (np.logaddexp(0.0, z) - y * z).tobytes()
    whole, few = ProgressiveMetrics(window=700), ProgressiveMetrics(window=700)
    whole.update(z, y)
    lo = 0
    while lo < z.size:
        size = int(rng.integers(1, 9))
        few.update(z[lo : lo + size], y[lo : lo + size])
        lo += size
    a, b = whole.state_dict(), few.state_dict()
    assert a["sum"] == b["sum"] and a["count"] == b["count"] and a["head"] == b["head"]
    for key in ("z", "y", "history"):
        assert a[key].tobytes() == b[key].tobytes(), key
    assert whole._ll.tobytes() == few._ll.tobytes()
    assert whole.log_loss_window == few.log_loss_window


def test_the_probabilities_taken_with_the_losses_are_the_scores_bit_for_bit() -> None:
    """`update(z, y, p)` (the columnar path's: one exp a row for the loss and the score's p)
    records what `update(z, y)` does, and gives each row the p a score of its logit has
    (`quick._p`), bit for bit, extremes, zeros and NaN included; and scipy's logistic function
    (the outside reference) to within a rounding."""
    from oddsmill.quick import _p
    from scipy.special import expit

    rng = np.random.default_rng(11)
    z = np.concatenate(
        [rng.normal(0, s, 20_000) for s in (1.0, 30.0, 1e3)]
        + [np.array([0.0, -0.0, 5e-324, -5e-324, 709.0, -745.0, 1e65, np.inf, -np.inf, np.nan])]
    )
    y = (rng.random(z.size) < 0.5).astype(float)
    plain, with_p = ProgressiveMetrics(window=500), ProgressiveMetrics(window=500)
    plain.update(z, y)
    p = np.full(z.size, -1.0)
    with_p.update(z, y, p)
    a, b = plain.state_dict(), with_p.state_dict()
    assert a["sum"] == b["sum"] or (np.isnan(a["sum"]) and np.isnan(b["sum"]))
    for key in ("z", "y", "history"):
        assert a[key].tobytes() == b[key].tobytes(), key
    assert plain._ll.tobytes() == with_p._ll.tobytes()
    assert p.tobytes() == np.array([_p(v) for v in z.tolist()]).tobytes()
    finite = np.isfinite(z)
    np.testing.assert_allclose(p[finite], expit(z[finite]), rtol=1e-15, atol=1e-300)


@pytest.mark.parametrize("n", [1, 63, 64, 65, 999, 10_000])
def test_the_compiled_sums_hold_to_exact_sums(n: int) -> None:
    """The window's sum (chunks of the ring summed in order, chunks written to summed again) is a
    function of the ring's contents alone: after any writes it equals a fresh summation of every
    chunk. Outside references: Python's math.fsum (the correctly rounded sum) for its accuracy, and
    numpy's logaddexp(0, z) - y z for each event's loss, bit for bit."""
    import math

    from oddsmill.progressive import _losses, _window_sum

    rng = np.random.default_rng(n)
    for scale in (1e-3, 1.0, 1e3):
        z = rng.normal(0, scale, n)
        y = (rng.random(n) < 0.5).astype(float)
        ll = _losses(z, y)
        assert ll.tobytes() == (np.logaddexp(0.0, z) - y * z).tobytes()
        chunks = np.zeros((n + 63) // 64)
        dirty = np.ones(chunks.size, dtype=np.bool_)
        assert _window_sum(ll, chunks, dirty) == pytest.approx(math.fsum(ll.tolist()), rel=1e-13)
        for _ in range(5):  # a few slots rewritten, their chunks marked: the same as summing all again
            at = rng.integers(0, n, 3)
            ll[at] = rng.exponential(size=3) * scale
            dirty[at // 64] = True
            again = _window_sum(ll, chunks, dirty)
            assert again == _window_sum(ll, np.zeros_like(chunks), np.ones_like(dirty))
            assert again == pytest.approx(math.fsum(ll.tolist()), rel=1e-13)


def test_the_window_figures_follow_every_update() -> None:
    """The window's probabilities, bins, Brier score and log-loss are computed once a count and
    kept: after every update they must be those of a copy restored from the state (which has
    computed nothing yet), so a kept figure is never stale."""
    from sklearn.metrics import brier_score_loss

    rng = np.random.default_rng(9)
    m = ProgressiveMetrics(window=300)
    zs: list[float] = []
    ys: list[float] = []
    for size in (1, 5, 40, 3, 200, 7, 120):
        z = rng.normal(0, 2, size)
        y = (rng.random(size) < sigmoid(z)).astype(float)
        m.update(z, y)
        zs.extend(z.tolist())
        ys.extend(y.tolist())
        fresh = ProgressiveMetrics.from_state_dict(m.state_dict())
        assert repr(m.calibration_bins()) == repr(fresh.calibration_bins())  # (empty bins hold NaN)
        assert m.brier_window == fresh.brier_window
        assert m.calibration_error_window == fresh.calibration_error_window
        assert m.log_loss_window == fresh.log_loss_window
        # Source: scikit-learn's brier_score_loss over the last 300 published scores
        last_z, last_y = np.array(zs[-300:]), np.array(ys[-300:])
        assert m.brier_window == pytest.approx(brier_score_loss(last_y, sigmoid(last_z)), rel=1e-12)
