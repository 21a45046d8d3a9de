"""The batch reference fit: Newton's method (IRLS) on the learner's objective (PROTOCOL 5).

Maximises (1/n) sum_i w_i [y_i log p_i + (1 - y_i) log(1 - p_i)] - (lambda / 2) ||theta||^2 over the
intercept and theta, theta in the learner's standardised units (x / s_j, with s_j the scale the
learner would give feature j), so that it is the point the online weights converge to. Standard
errors come from the observed information of the penalised log-likelihood (n times the negative
Hessian of the objective), Wald intervals from them; results are reported in raw units.

Never imported by the server loop.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import OddsmillError
from .progressive import log_loss_from_logit

Z95 = 1.959963984540054  # the 97.5% point of the standard normal
ALIAS_TOL = 1e-9  # a column whose residual is below this fraction of its norm is aliased


class AliasedError(OddsmillError):
    """Features collinear with others (and the intercept) at L2 = 0."""

    def __init__(self, names: list[str]) -> None:
        super().__init__(
            "these features are aliased (a linear combination of the intercept and other features), "
            f"so their coefficients are not identified: {', '.join(names)}; "
            "drop them, or give a small L2 penalty (for example --l2 1e-6)"
        )
        self.names = names


@dataclass(frozen=True)
class FitResult:
    names: list[str]
    coef: np.ndarray  # raw units; [0] is the intercept
    se: np.ndarray
    n: int
    iterations: int
    converged: bool
    log_loss: float  # mean negative log-likelihood per event
    objective: float

    def z(self) -> np.ndarray:
        out: np.ndarray = self.coef / self.se
        return out

    def p_values(self) -> np.ndarray:
        return np.array([math.erfc(abs(v) / math.sqrt(2.0)) for v in self.z()])

    def as_json(self) -> dict[str, object]:
        z, p = self.z(), self.p_values()

        def row(k: int) -> dict[str, object]:
            c, s = float(self.coef[k]), float(self.se[k])
            return {
                "coef": c,
                "se": s,
                "z": float(z[k]),
                "p_value": float(p[k]),
                "ci95": [c - Z95 * s, c + Z95 * s],
            }

        coefs = []
        for k, name in enumerate(self.names, start=1):
            r = row(k)
            r = {"feature": name, **r, "odds_ratio": _odds(float(self.coef[k]))}
            coefs.append(r)
        return {
            "n": self.n,
            "iterations": self.iterations,
            "converged": self.converged,
            "log_loss": self.log_loss,
            "intercept": row(0),
            "coefficients": coefs,
        }


def _odds(c: float) -> float:
    return math.exp(c) if c < 709.0 else float("inf")


def aliased_columns(X: np.ndarray) -> list[int]:
    """Columns (of X, after an implicit intercept) that are linear combinations of the intercept and
    earlier columns: Gram-Schmidt in order, keeping the first of every collinear set."""
    n = X.shape[0]
    basis = [np.ones(n) / math.sqrt(n)]
    bad = []
    for j in range(X.shape[1]):
        v = X[:, j].astype(np.float64).copy()
        norm = np.linalg.norm(v)
        for _ in range(2):  # twice is enough (Kahan-Parlett)
            for q in basis:
                v -= (q @ v) * q
        r = np.linalg.norm(v)
        if norm == 0.0 or r <= ALIAS_TOL * norm:
            bad.append(j)
        else:
            basis.append(v / r)
    return bad


def newton_fit(
    X: np.ndarray,
    y: np.ndarray,
    w: np.ndarray,
    scale: np.ndarray,
    l2: float,
    names: list[str],
    max_iter: int = 100,
    tol: float = 1e-12,
) -> FitResult:
    """Fit on raw features X (n x d; absent = 0) with standardising scales `scale`."""
    n, d = X.shape
    if n == 0:
        raise OddsmillError("no labelled events to fit")
    if l2 == 0.0:
        bad = aliased_columns(X)
        if bad:
            raise AliasedError([names[j] for j in bad])
    Z = np.hstack([np.ones((n, 1)), X / scale])
    pen = np.full(d + 1, l2)
    pen[0] = 0.0
    beta = np.zeros(d + 1)

    def objective(b: np.ndarray) -> float:
        return float(-np.sum(w * log_loss_from_logit(Z @ b, y)) / n - 0.5 * np.sum(pen * b * b))

    f = objective(beta)
    converged = False
    iterations = 0
    for _ in range(max_iter):
        iterations += 1
        z = Z @ beta
        p = np.exp(-np.logaddexp(0.0, -z))
        grad = Z.T @ (w * (y - p)) / n - pen * beta
        hess = (Z.T * (w * p * (1.0 - p))) @ Z / n + np.diag(pen)
        try:
            step = np.linalg.solve(hess, grad)
        except np.linalg.LinAlgError:
            break
        # step-halving keeps every iterate an ascent
        t = 1.0
        while True:
            f_new = objective(beta + t * step)
            if f_new >= f - 1e-15 * abs(f) or t < 1e-10:
                break
            t *= 0.5
        beta = beta + t * step
        change = abs(f_new - f) / (abs(f) + tol)
        f = f_new
        if change < tol and np.max(np.abs(t * step)) < 1e-8 * (1.0 + np.max(np.abs(beta))):
            converged = True
            break
    z = Z @ beta
    p = np.exp(-np.logaddexp(0.0, -z))
    info = (Z.T * (w * p * (1.0 - p))) @ Z + n * np.diag(pen)
    try:
        cov = np.linalg.inv(info)
        se_std = np.sqrt(np.maximum(np.diag(cov), 0.0))
    except np.linalg.LinAlgError:
        se_std = np.full(d + 1, np.nan)
    unit = np.concatenate([[1.0], scale])
    mean_ll = float(np.sum(w * log_loss_from_logit(z, y)) / n)
    return FitResult(names, beta / unit, se_std / unit, n, iterations, converged, mean_ll, f)
