"""The Newton reference fit against outside references."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from oddsmill.reference import AliasedError, NoOptimumError, newton_fit


def test_spector_matches_statsmodels_logit() -> None:
    # Source: statsmodels' bundled Spector and Mazzeo (1980) data, fitted by statsmodels Logit.
    import statsmodels.api as sm

    data = sm.datasets.spector.load_pandas()
    X = data.exog[["GPA", "TUCE", "PSI"]].to_numpy(float)
    y = data.endog.to_numpy(float)
    ref = sm.Logit(y, sm.add_constant(X)).fit(disp=0, tol=1e-14, maxiter=200)
    ours = newton_fit(X, y, np.ones(len(y)), X.std(0), 0.0, ["GPA", "TUCE", "PSI"])
    assert ours.converged
    np.testing.assert_allclose(ours.coef, ref.params, rtol=1e-6)
    np.testing.assert_allclose(ours.se, ref.bse, rtol=1e-6)
    np.testing.assert_allclose(ours.log_loss, -ref.llf / len(y), rtol=1e-9)


def test_spector_matches_greene_published_table() -> None:
    # Source: Greene, Econometric Analysis, the Spector-Mazzeo logit (values from memory):
    # intercept -13.021, GPA 2.826, TUCE 0.0952, PSI 2.379; standard errors 4.931, 1.263, 0.142, 1.065.
    import statsmodels.api as sm

    data = sm.datasets.spector.load_pandas()
    X = data.exog[["GPA", "TUCE", "PSI"]].to_numpy(float)
    y = data.endog.to_numpy(float)
    ours = newton_fit(X, y, np.ones(len(y)), np.ones(3), 0.0, ["GPA", "TUCE", "PSI"])
    assert [round(v, 3) for v in ours.coef] == [-13.021, 2.826, 0.095, 2.379]
    assert round(ours.coef[2], 4) == 0.0952
    assert [round(v, 3) for v in ours.se] == [4.931, 1.263, 0.142, 1.065]


def test_l2_matches_scikit_learn_on_breast_cancer() -> None:
    # Source: scikit-learn LogisticRegression (newton-cholesky solver) on its bundled breast-cancer data. Its objective
    # C sum_i loss_i + ||w||^2 / 2 equals ours times n / lambda when C = 1 / (n lambda); its intercept
    # is not penalised.
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression

    X, y = load_breast_cancer(return_X_y=True)
    y = y.astype(float)
    scale = X.std(0)
    lam = 1e-2
    n = len(y)
    ours = newton_fit(X, y, np.ones(n), scale, lam, [f"f{i}" for i in range(X.shape[1])])
    sk = LogisticRegression(C=1.0 / (n * lam), solver="newton-cholesky", tol=1e-14, max_iter=1000)
    sk.fit(X / scale, y)
    np.testing.assert_allclose(ours.coef[1:] * scale, sk.coef_[0], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(ours.coef[0], sk.intercept_[0], rtol=1e-6)


def test_aliased_one_hot_group_is_named_at_l2_zero_and_fits_with_small_l2() -> None:
    rng = np.random.default_rng(1)
    level = rng.integers(0, 3, 500)
    X = np.column_stack([np.eye(3)[level], rng.normal(size=500)])
    y = (rng.random(500) < 0.4).astype(float)
    names = ["depot=Harbourside", "depot=Millbrook", "depot=Eastgate", "route_km"]
    with pytest.raises(AliasedError) as info:
        newton_fit(X, y, np.ones(500), np.ones(4), 0.0, names)
    assert info.value.names == ["depot=Eastgate"]
    assert "--l2" in str(info.value)
    ok = newton_fit(X, y, np.ones(500), np.ones(4), 1e-6, names)
    assert ok.converged and np.all(np.isfinite(ok.se))
    # With a penalty the fit runs, and says which coefficients the penalty splits. Source of the
    # check: numpy's rank of the design with its intercept (by SVD, not our QR) is one short.
    assert np.linalg.matrix_rank(np.column_stack([np.ones(500), X])) == X.shape[1]
    assert [(w.kind, w.features) for w in ok.warnings] == [("aliased", ("depot=Eastgate",))]


def test_a_feature_in_no_labelled_event_is_named_apart_from_the_aliased() -> None:
    rng = np.random.default_rng(4)
    X = np.column_stack([rng.normal(size=300), np.zeros(300)])  # the second only ever scored
    y = (rng.random(300) < 0.4).astype(float)
    fit = newton_fit(X, y, np.ones(300), np.ones(2), 1e-4, ["route_km", "courier=C-17"])
    assert [(w.kind, w.features) for w in fit.warnings] == [("absent", ("courier=C-17",))]
    assert fit.coef[2] == 0.0


def _statsmodels_finds_no_optimum(y: np.ndarray, X: np.ndarray) -> bool:
    """Source: statsmodels' unpenalised Logit. It finds no optimum when it flags perfect separation
    (a warning since 0.14, an error before) or its Newton steps do not converge."""
    import statsmodels.api as sm

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            res = sm.Logit(y, sm.add_constant(X, has_constant="add")).fit(disp=0, maxiter=100)
        except Exception as e:  # PerfectSeparationError (statsmodels < 0.14)
            return "separation" in type(e).__name__.lower()
    if any("separation" in w.category.__name__.lower() for w in caught):
        return True
    return not res.mle_retvals["converged"]


def test_one_outcome_only_is_refused_where_statsmodels_finds_no_optimum() -> None:
    rng = np.random.default_rng(5)
    X = rng.normal(size=(200, 2))
    y = np.ones(200)
    assert _statsmodels_finds_no_optimum(y, X)
    with pytest.raises(NoOptimumError, match="all 200 labelled events have y = 1: with one outcome only"):
        newton_fit(X, y, np.ones(200), np.ones(2), 1e-4, ["route_km", "stops_before"])
    with pytest.raises(NoOptimumError, match="the one labelled event has y = 0"):
        newton_fit(X[:1], np.zeros(1), np.ones(1), np.ones(2), 1e-4, ["route_km", "stops_before"])


def test_complete_separation_is_flagged_where_statsmodels_finds_no_optimum() -> None:
    rng = np.random.default_rng(6)
    x = rng.uniform(1.0, 5.0, 200) * rng.choice([-1.0, 1.0], 200)  # a margin on either side of 0
    X = np.column_stack([x, rng.normal(size=200)])
    y = (x > 0).astype(float)
    names = ["route_km", "stops_before"]
    assert _statsmodels_finds_no_optimum(y, X)
    fit = newton_fit(X, y, np.ones(200), np.ones(2), 1e-4, names)
    assert [w.kind for w in fit.warnings] == ["separation"]
    assert "L2 = 0.0001" in fit.warnings[0].detail
    with pytest.raises(NoOptimumError, match="separate the outcomes completely.*--l2 1e-4"):
        newton_fit(X, y, np.ones(200), np.ones(2), 0.0, names)


def test_spector_has_an_optimum_for_statsmodels_and_no_warning_here() -> None:
    # the control of the two tests above: statsmodels' bundled Spector and Mazzeo (1980) data
    import statsmodels.api as sm

    data = sm.datasets.spector.load_pandas()
    X = data.exog[["GPA", "TUCE", "PSI"]].to_numpy(float)
    y = data.endog.to_numpy(float)
    assert not _statsmodels_finds_no_optimum(y, X)
    for l2 in (0.0, 1e-4):
        assert newton_fit(X, y, np.ones(len(y)), X.std(0), l2, ["GPA", "TUCE", "PSI"]).warnings == ()


def test_a_feature_present_in_one_outcome_only_is_named_where_statsmodels_lets_it_run_away() -> None:
    """Quasi-complete separation by one feature: a depot whose every parcel was late. statsmodels'
    unpenalised Logit does not converge and that coefficient runs away (24.6, standard error
    4.5e4 with statsmodels 0.15 here); the others stay as they were."""
    import statsmodels.api as sm

    rng = np.random.default_rng(5)
    x = rng.normal(size=400)
    y = (rng.random(400) < 1 / (1 + np.exp(-(0.8 * x - 0.5)))).astype(float)
    depot = np.zeros(400)
    depot[np.nonzero(y == 1)[0][:12]] = 1.0
    # present only in late parcels too, but of both signs: a larger coefficient makes some of them
    # likelier and others less likely, so it has an optimum, and it is not named
    delta = np.zeros(400)
    delta[np.nonzero(y == 1)[0][20:40]] = rng.normal(size=20)
    X = np.column_stack([x, depot, delta])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ref = sm.Logit(y, sm.add_constant(X)).fit(disp=0, maxiter=100)
    assert not ref.mle_retvals["converged"]
    assert ref.params[2] > 10 and ref.bse[2] > 100 and ref.bse[1] < 1 and ref.bse[3] < 10
    names = ["route_km", "depot=Fenwick Yard", "weight_delta"]
    fit = newton_fit(X, y, np.ones(400), np.ones(3), 1e-4, names)
    assert [(w.kind, w.features) for w in fit.warnings] == [("one_outcome", ("depot=Fenwick Yard",))]
    assert "depot=Fenwick Yard (12 events, all y = 1)" in fit.warnings[0].detail
    with pytest.raises(NoOptimumError, match=r"depot=Fenwick Yard \(12 events, all y = 1\).*drop them"):
        newton_fit(X, y, np.ones(400), np.ones(3), 0.0, names)


def test_importance_weights_match_scikit_learn_sample_weight() -> None:
    # Source: scikit-learn LogisticRegression with sample_weight: C sum_i w_i loss_i + ||w||^2 / 2,
    # the same objective as ours (1/n) sum_i w_i l_i - lambda/2 ||theta||^2 when C = 1 / (n lambda).
    from sklearn.datasets import load_breast_cancer
    from sklearn.linear_model import LogisticRegression

    X, y = load_breast_cancer(return_X_y=True)
    y = y.astype(float)
    n, scale, lam = len(y), X.std(0), 1e-2
    w = np.random.default_rng(3).uniform(0.1, 4.0, n)
    ours = newton_fit(X, y, w, scale, lam, [f"f{i}" for i in range(X.shape[1])])
    sk = LogisticRegression(C=1.0 / (n * lam), solver="newton-cholesky", tol=1e-14, max_iter=1000)
    sk.fit(X / scale, y, sample_weight=w)
    np.testing.assert_allclose(ours.coef[1:] * scale, sk.coef_[0], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(ours.coef[0], sk.intercept_[0], rtol=1e-6)
