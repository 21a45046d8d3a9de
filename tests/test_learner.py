"""The online learner against river, scikit-learn's averaged SGD, the dense oracle, and its own exactness promises."""

from __future__ import annotations

import numpy as np
import pytest
from oddsmill import kernel as K
from oddsmill.encoding import BlockBuilder
from oddsmill.learner import OLD_ROW_ORDER, Learner
from oddsmill.schedules import rate
from oddsmill.settings import LearnerSettings

from tests.conftest import sparse_stream
from tests.oracle import oracle_for


def _constant(eta0: float) -> tuple[dict, object]:  # type: ignore[type-arg]
    """constant: eta0 is river's Constant (what SGD(eta0) makes of a number)."""
    from river import optim

    return dict(schedule="constant", eta0=eta0, l2=1e-3), optim.schedulers.Constant(eta0)


def _power(eta0: float, c: float) -> tuple[dict, object]:  # type: ignore[type-arg]
    """power: eta0 (1 + a eta0 t)^-c with a = 1 / eta0 is river's InverseScaling, eta0 / (t + 1)^c."""
    from river import optim

    return dict(schedule="power", eta0=eta0, decay=1 / eta0, power=c, l2=1e-3), optim.schedulers.InverseScaling(eta0, c)


def _inverse_time(l2: float) -> tuple[dict, object]:  # type: ignore[type-arg]
    """inverse-time: eta0 / (1 + lambda eta0 t) is river's Optimal, 1 / (alpha (t0 + t)) with
    alpha = lambda and t0 = 1 / (eta0 alpha) (both Bottou's), at river's own eta0 for the log loss."""
    from river import optim

    theirs = optim.schedulers.Optimal(optim.losses.Log(), alpha=l2)
    return dict(schedule="inverse-time", eta0=1 / (l2 * theirs.t0), l2=l2), theirs


@pytest.mark.parametrize(
    "schedules",
    [lambda: _constant(0.05), lambda: _power(0.5, 0.75), lambda: _inverse_time(1e-2)],
    ids=["constant", "power", "inverse-time"],
)
def test_the_schedules_match_river_step_for_step(phishing_data, schedules) -> None:  # type: ignore[no-untyped-def]
    # Source: river's LogisticRegression with SGD(scheduler), the scheduler's rate at step t (its
    # optimiser's count of updates, from 0) for the weights and the intercept alike, and the same
    # L2, on river's bundled Phishing data. river's L2 touches only the features present in an
    # event; every Phishing event carries all 9 features, so the two updates are the same. The
    # schedules of PROTOCOL 5 are river's at the settings of each case.
    from river import linear_model, optim

    ours, eta = schedules()
    mine = Learner(LearnerSettings(**ours, average=False, scaling="none"))
    theirs = linear_model.LogisticRegression(optimizer=optim.SGD(eta), l2=ours["l2"], intercept_lr=eta)
    worst = 0.0
    for t, (x, y) in enumerate(phishing_data):
        assert mine.learning_rate() == pytest.approx(eta.get(t), rel=1e-12)
        z = mine.learn_one(x, y)
        assert abs(1 / (1 + np.exp(-z)) - theirs.predict_proba_one(x)[True]) < 1e-9
        theirs.learn_one(x, y)
        c = mine.coefficients()
        worst = max(
            worst, *(abs(c.as_dict()[k] - v) for k, v in theirs.weights.items()), abs(c.intercept - theirs.intercept)
        )
    assert theirs.optimizer.n_iterations == t + 1 > 1000
    if ours["schedule"] != "constant":
        assert eta.get(t) < 0.2 * eta.get(0)  # (the rate decayed over the run: the schedule is not a constant)
    assert worst < 1e-9


def test_adagrad_matches_river_step_for_step(phishing_data) -> None:  # type: ignore[no-untyped-def]
    # Source: river's LogisticRegression with optim.AdaGrad(eta0, eps), on river's bundled Phishing
    # data. river's AdaGrad steps by eta0 / sqrt(G + eps) with G the feature's sum of squared
    # gradients, this one's included; PROTOCOL 5's by eta0 / (delta + sqrt(G)). With eps and delta
    # vanishingly small they agree. river's intercept takes a rate of its own, not AdaGrad's, so it
    # is held at 0 and a feature of value 1 in every event stands for ours; L2 is off, since river
    # would penalise that feature and ours does not penalise the intercept.
    from river import linear_model, optim

    mine = Learner(
        LearnerSettings(schedule="adagrad", eta0=0.5, adagrad_delta=1e-150, l2=0.0, average=False, scaling="none")
    )
    theirs = linear_model.LogisticRegression(optimizer=optim.AdaGrad(0.5, eps=1e-300), l2=0.0, intercept_lr=0.0)
    worst = 0.0
    for x, y in phishing_data:
        z = mine.learn_one(x, y)
        with_one = {**x, "one": 1.0}
        assert abs(1 / (1 + np.exp(-z)) - theirs.predict_proba_one(with_one)[True]) < 1e-12
        theirs.learn_one(with_one, y)
        c = mine.coefficients()
        mine_all = {**c.as_dict(), "one": c.intercept}
        worst = max(worst, *(abs(mine_all[k] - v) for k, v in theirs.weights.items()))
    assert theirs.intercept == 0.0 and set(theirs.weights) == set(mine_all)
    assert worst < 1e-12


@pytest.mark.parametrize(
    ("ours", "theirs", "weighted"),
    [
        (
            dict(schedule="constant", eta0=0.05, average_start=0),
            dict(learning_rate="constant", eta0=0.05, average=True),
            False,
        ),
        # invscaling's eta0 / t^c, t from 1, is the power schedule at a = 1 / eta0; averaging from
        # the 100th event seen (scikit-learn's average=100) is from step 99, steps counting from 0
        (
            dict(schedule="power", eta0=0.5, decay=2.0, power=0.5, average_start=99),
            dict(learning_rate="invscaling", eta0=0.5, power_t=0.5, average=100),
            True,
        ),
    ],
    ids=["constant", "power-weighted"],
)
def test_averaged_weights_match_scikit_learns_averaged_sgd(phishing_data, ours, theirs, weighted: bool) -> None:  # type: ignore[no-untyped-def]
    # Source: scikit-learn's SGDClassifier(loss="log_loss", penalty="l2", average=...), one pass in
    # order (shuffle off), on river's bundled Phishing data, with sample weights in one case. Its
    # step shrinks the weights by (1 - eta alpha) and adds -eta w dloss x: PROTOCOL 5's update with
    # lambda = alpha. Its averaged coef_ and intercept_ are the Polyak-Ruppert average of PROTOCOL 5.
    import warnings

    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import SGDClassifier

    names = list(phishing_data[0][0])
    X = np.array([[x[k] for k in names] for x, _ in phishing_data])
    y = np.array([int(t) for _, t in phishing_data])
    w = np.random.default_rng(3).uniform(0.2, 3.0, y.size) if weighted else np.ones(y.size)

    def learned(average: bool) -> Learner:
        one = Learner(LearnerSettings(**ours, l2=1e-3, average=average, scaling="none"))
        for (x, t), wi in zip(phishing_data, w, strict=True):
            one.learn_one(x, t, float(wi))
        return one

    mine = learned(average=True)
    sk = SGDClassifier(loss="log_loss", penalty="l2", alpha=1e-3, shuffle=False, max_iter=1, tol=None, **theirs)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # (one pass is what is asked for)
        sk.fit(X, y, sample_weight=w if weighted else None)
    c = mine.coefficients()
    assert max(abs(c.as_dict()[k] - v) for k, v in zip(names, sk.coef_[0], strict=True)) < 1e-12
    assert abs(c.intercept - sk.intercept_[0]) < 1e-12
    assert (
        abs(learned(average=False).coefficients().intercept - c.intercept) > 1e-3
    )  # (the average is not the last iterate)


SETTINGS = [
    dict(schedule="constant", eta0=0.1, l2=1e-2),
    dict(schedule="inverse-time", eta0=0.3, l2=1e-2),
    dict(schedule="power", eta0=0.5, l2=1e-3, decay=0.1),
    dict(schedule="adagrad", eta0=0.5, l2=1e-2),
]


def _numeric(x: dict) -> dict:  # type: ignore[type-arg]
    """The oracle's view of an event: encoded names and float values."""
    out = {}
    for k, v in x.items():
        if isinstance(v, str):
            out[f"{k}={v}"] = 1.0
        elif v is not None:
            out[k] = float(v)
    return out


@pytest.mark.parametrize("average", [False, True])
@pytest.mark.parametrize("kw", SETTINGS, ids=[s["schedule"] for s in SETTINGS])
def test_lazy_updates_equal_the_dense_oracle(kw: dict, average: bool) -> None:  # type: ignore[type-arg]
    """The scale factor / lazy catch-up L2, the u + A v averages, the centring and the importance
    weights equal a dense step-by-step reference on sparse events, to 1e-12 relative."""
    s = LearnerSettings(**kw, average=average, average_start=50, scale_warmup=200)
    lr, orc = Learner(s), oracle_for(s)
    weights = np.random.default_rng(7).uniform(0.2, 3.0, 1500)
    for i, (x, y) in enumerate(sparse_stream(1500, seed=3)):
        xe = _numeric(x)
        z = lr.learn_one(x, y, float(weights[i]))
        assert z == pytest.approx(orc.logit(xe), rel=1e-12, abs=1e-12), i
        orc.learn(xe, y, float(weights[i]))
    assert lr._sc[K.S_NCENT] > 0  # the centring was exercised
    b, coefs = orc.coefficients()
    c = lr.coefficients()
    assert c.intercept == pytest.approx(b, rel=1e-12, abs=1e-12)
    for name, v in c.as_dict().items():
        assert v == pytest.approx(coefs[name], rel=1e-10, abs=1e-12), name


@pytest.mark.parametrize("kw", SETTINGS, ids=[s["schedule"] for s in SETTINGS])
def test_blocks_of_any_size_are_bit_identical(kw: dict) -> None:  # type: ignore[type-arg]
    events = sparse_stream(2000, seed=5)
    results = []
    for size in (1, 7, 256, 2000):
        lr = Learner(LearnerSettings(**kw, average_start=100))
        for lo in range(0, len(events), size):
            b = BlockBuilder()
            for x, y in events[lo : lo + size]:
                slots, values = lr.encode(x)
                b.add(slots, values, K.OP_TRAIN, float(y), 1.0)
            lr.run(b.build())
        sd = lr.state_dict()
        results.append((sd["scalars"].tobytes(), sd["slots"].tobytes()))
    assert all(r == results[0] for r in results)


def test_renormalisation_of_the_weight_scale_keeps_the_model() -> None:
    """With a strong L2 the scale falls under its floor many times; the model still equals the
    dense oracle."""
    s = LearnerSettings(schedule="constant", eta0=0.5, l2=0.5, average=True, scale_warmup=50)
    lr, orc = Learner(s), oracle_for(s)
    for x, y in sparse_stream(600, seed=8):
        xe = _numeric(x)
        lr.learn_one(x, y)
        orc.learn(xe, y)
    assert lr.renormalisations > 5
    b, coefs = orc.coefficients()
    assert lr.coefficients().intercept == pytest.approx(b, rel=1e-9)
    for name, v in lr.coefficients().as_dict().items():
        assert v == pytest.approx(coefs[name], rel=1e-9, abs=1e-15)


@pytest.mark.parametrize(
    "schedule,t,expected",
    [
        # eta0 = 0.5, l2 = 0.01, a = 0.1, c = 0.75, delta = 1
        ("constant", 0, 0.5),
        ("constant", 10**6, 0.5),
        ("inverse-time", 0, 0.5),
        ("inverse-time", 400, 0.5 / 3.0),
        ("power", 0, 0.5),
        ("power", 300, 0.5 * 16.0**-0.75),
    ],
)
def test_schedule_table(schedule: str, t: int, expected: float) -> None:
    s = LearnerSettings(schedule=schedule, eta0=0.5, l2=0.01, decay=0.1, power=0.75)
    assert rate(s, t) == pytest.approx(expected, rel=1e-15)
    prm = np.zeros(K.N_PARAMS)
    from oddsmill.learner import settings_record

    prm = settings_record(s)
    assert K._global_rate(prm, float(t)) == pytest.approx(expected, rel=1e-15)


def test_adagrad_rate_formula() -> None:
    s = LearnerSettings(schedule="adagrad", eta0=0.5, adagrad_delta=1.0)
    assert rate(s, 0, 9.0) == pytest.approx(0.5 / 4.0)


def test_settings_are_validated_with_field_and_value() -> None:
    from oddsmill.errors import ConfigError

    with pytest.raises(ConfigError, match="eta0 must be > 0, got -1"):
        LearnerSettings(eta0=-1)
    with pytest.raises(ConfigError, match="schedule must be one of"):
        LearnerSettings(schedule="cosine")
    with pytest.raises(ConfigError, match="largest rate times l2"):
        LearnerSettings(eta0=2.0, l2=0.6)


def test_vocabulary_cap_ignores_new_names_and_counts_them() -> None:
    lr = Learner(LearnerSettings(max_features=3))
    lr.learn_one({"a": 1.0, "b": 2.0, "c": 3.0}, 1)
    lr.learn_one({"a": 1.0, "d": 2.0, "e": "x"}, 0)
    assert lr.vocab.names == ["a", "b", "c"]
    assert lr.vocab.ignored == 2


def test_vocabulary_grows_to_many_slots() -> None:
    lr = Learner(LearnerSettings(schedule="constant", eta0=0.1))
    for i in range(5000):
        lr.learn_one({f"f{i}": 1.0, f"g{i % 7}": "on"}, i % 2)
    assert lr.n_features == 5007
    assert lr.state_dict()["slots"].shape[0] == 5007


@pytest.mark.parametrize("schedule", ["power", "adagrad"])
def test_checkpoints_with_the_old_row_order_load_and_continue_bit_for_bit(schedule: str) -> None:
    """Checkpoints written before AdaGrad's two columns moved to the end of a slot's row (and
    before the global schedules' rows lost them) hold 11 columns in the old order and no
    slot_order: they load into the same state, which then learns bit for bit as the original."""
    events = sparse_stream(3000, seed=8)

    def learn(lr: Learner, part: list[tuple[dict[str, object], int]]) -> None:
        for x, y in part:
            lr.learn_one(x, y)

    lr = Learner(LearnerSettings(schedule=schedule))
    learn(lr, events[:1500])
    d = lr.state_dict()
    assert d["slots"].shape[1] == (11 if schedule == "adagrad" else 9)
    old = dict(d)
    del old["slot_order"]
    rows = np.zeros((d["slots"].shape[0], 11))
    rows[:, : d["slots"].shape[1]] = d["slots"]  # the new order, AdaGrad's columns last (or zeros)
    back = np.empty_like(rows)
    back[:, list(OLD_ROW_ORDER)] = rows  # the columns where the old order had them
    old["slots"] = back
    again = Learner.from_state_dict(old)
    assert again.state_dict()["slots"].tobytes() == d["slots"].tobytes()
    learn(lr, events[1500:])
    learn(again, events[1500:])
    assert again.state_dict()["slots"].tobytes() == lr.state_dict()["slots"].tobytes()
    assert again.coefficients().coefs.tobytes() == lr.coefficients().coefs.tobytes()


HEAP_PROBE = r"""
import resource, sys
from oddsmill.learner import give_back_large_frees, keep_freed_heap
assert give_back_large_frees()  # as `oddsmill serve` does
if sys.argv[1] == "keep":
    assert keep_freed_heap()

def faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt

def burst():  # 64 MB in bodies of 80 KB (a columnar block's), each written, then all freed
    before = faults()
    bodies = [b"\x01" * 80_000 for _ in range(800)]
    del bodies
    return faults() - before

burst()
print(burst())
"""


@pytest.mark.parametrize("keep", [True, False], ids=["kept", "glibc's own"])
def test_the_heap_freed_after_a_burst_is_kept_for_the_next(keep: bool) -> None:
    """`keep_freed_heap` (what `oddsmill serve` sets at start): a second burst of 80 KB bodies
    reuses the pages the first freed, where glibc's own setting handed them back at the free and
    faulted them in again, one fault a 4 KiB page (about 15,600 for 64 MB)."""
    import subprocess
    import sys

    if sys.platform != "linux":
        pytest.skip("glibc's allocator")
    out = subprocess.run(
        [sys.executable, "-c", HEAP_PROBE, "keep" if keep else "own"], capture_output=True, text=True, check=True
    )
    second = int(out.stdout)
    if keep:
        assert second < 1_000, second
    else:
        assert second > 10_000, second
