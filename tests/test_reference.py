"""The Newton reference fit against outside references."""

from __future__ import annotations

import numpy as np
import pytest
from oddsmill.reference import AliasedError, newton_fit


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
