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
QR_ROWS = 8192  # rows of Z taken into its QR at a time (`aliased_columns`)


class AliasedError(OddsmillError):
    """Features collinear with others (and the intercept) at L2 = 0."""

    def __init__(self, names: list[str]) -> None:
        super().__init__(
            "these features are aliased (a linear combination of the intercept and other features), "
            f"so their coefficients are not identified: {', '.join(names)}; "
            "drop them, or give a small L2 penalty (for example --l2 1e-6)"
        )
        self.names = names


class NoOptimumError(OddsmillError):
    """Data on which the objective has no maximum: no labelled event, one outcome only, or (at
    L2 = 0) outcomes the features separate."""


@dataclass(frozen=True)
class FitWarning:
    """What makes some of a fit's figures the penalty's rather than the data's (`diagnose`)."""

    kind: str  # "separation", "one_outcome", "aliased", "absent"; "vocabulary_full" (offline.fit_logs)
    features: tuple[str, ...]  # the features concerned (none for "separation")
    detail: str  # a sentence for a person

    def as_json(self) -> dict[str, object]:
        return {"kind": self.kind, "features": list(self.features), "detail": self.detail}


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
    warnings: tuple[FitWarning, ...] = ()

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
            "warnings": [w.as_json() for w in self.warnings],
        }


def _odds(c: float) -> float:
    return math.exp(c) if c < 709.0 else float("inf")


def aliased_columns(Z: np.ndarray) -> list[int]:
    """Features (columns of Z after its first, the intercept's) that are linear combinations of the
    columns before them: those whose distance from the span of the earlier columns is at most
    ALIAS_TOL of their norm, or which are 0. That distance is |R_jj| of Z's QR decomposition, so of
    every collinear set the first columns are kept and the last named. R is found a block of rows
    at a time (Householder's QR of the R so far stacked on the next rows, LAPACK's geqrf through
    numpy: the same R, up to signs), so that no copy of Z is made: 200,000 events of 202 features
    in 1.3 to 1.9 s here, where Gram-Schmidt a column at a time took 15.7 s, and numpy's QR of the
    whole matrix 2.3 s and a copy of it (the fit's peak 1.31 GiB against 1.02)."""
    n, k = Z.shape
    norms = np.linalg.norm(Z, axis=0)
    rows = max(QR_ROWS, 4 * k)
    r: np.ndarray = np.zeros((0, k))
    for lo in range(0, n, rows):  # (mode "r" returns R alone, an array; numpy's stubs say a QRResult)
        r = np.asarray(np.linalg.qr(np.vstack([r, Z[lo : lo + rows]]), mode="r"))
    diag = np.zeros(k)
    m = min(r.shape)
    diag[:m] = np.abs(np.diag(r)[:m])
    return [j - 1 for j in range(1, k) if norms[j] == 0.0 or diag[j] <= ALIAS_TOL * norms[j]]


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
    if n == 0:  # bad input, as one outcome only is (exit 2)
        raise NoOptimumError("no labelled events to fit: a fit needs events with y, of both outcomes")
    _both_outcomes(y, w)
    Z = np.hstack([np.ones((n, 1)), X / scale])
    bad = aliased_columns(Z)
    if l2 == 0.0 and bad:
        raise AliasedError([names[j] for j in bad])
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
    found = diagnose(X, y, w, z, names, l2, bad)
    return FitResult(names, beta / unit, se_std / unit, n, iterations, converged, mean_ll, f, found)


def _both_outcomes(y: np.ndarray, w: np.ndarray) -> None:
    """Refuse events of one outcome: the intercept, which is not penalised, would grow without
    bound (the log-likelihood then has no maximum, whatever the penalty)."""
    ones = float(np.sum(w * y))
    zeros = float(np.sum(w * (1.0 - y)))
    if ones == 0.0 or zeros == 0.0:
        which = "the one labelled event has" if y.shape[0] == 1 else f"all {y.shape[0]:,} labelled events have"
        raise NoOptimumError(
            f"{which} y = {1 if zeros == 0.0 else 0}: with one outcome only "
            "the log-likelihood has no maximum (the intercept, which is not penalised, grows without bound); "
            "a fit needs events of both outcomes"
        )


def diagnose(
    X: np.ndarray, y: np.ndarray, w: np.ndarray, z: np.ndarray, names: list[str], l2: float, aliased: list[int]
) -> tuple[FitWarning, ...]:
    """What the data leave to the penalty, given the fitted logits z (raises NoOptimumError at
    L2 = 0, where nothing holds the coefficients back):
    - separation: every event lies on its own side of the fitted boundary (z > 0 where y = 1, z < 0
      where y = 0). The boundary itself proves the data separable, and then the log-likelihood
      grows without bound along it (Albert and Anderson, Biometrika 71, 1984; cited from memory). Separable data the
      penalised boundary does not separate go unflagged;
    - one_outcome: a feature of one sign (>= 0 throughout, or <= 0) that is present (not 0) only in
      events of one outcome: raising its coefficient's size raises those events' likelihood and no
      other's, so it too grows without bound (quasi-complete separation by one feature: a depot
      whose every parcel was late);
    - aliased, absent: `aliased_columns`, split into features that are 0 in every labelled event
      and the others."""
    found: list[FitWarning] = []

    def name(kind: str, columns: list[int], detail: str) -> None:
        found.append(FitWarning(kind, tuple(names[j] for j in columns), detail))

    ones = y > 0.5
    penalty = f"their sizes, standard errors, z and p-values here are the penalty's (L2 = {l2:g}), not the data's"
    if bool(np.all(np.where(ones, z > 0.0, z < 0.0))):
        if l2 == 0.0:
            raise NoOptimumError(
                "the features separate the outcomes completely (every labelled event lies on its own side of the "
                "fitted boundary): at L2 = 0 the log-likelihood has no maximum and the coefficients grow without "
                "bound; give a small L2 penalty (for example --l2 1e-4)"
            )
        found.append(
            FitWarning(
                "separation",
                (),
                "the features separate the outcomes completely: every labelled event lies on its own side of the "
                f"fitted boundary, so without the L2 penalty the coefficients would grow without bound; {penalty}",
            )
        )
    present = X != 0.0
    in_ones = present[ones].sum(axis=0)
    in_zeros = present[~ones].sum(axis=0)
    one_signed = (X.min(axis=0, initial=0.0) >= 0.0) | (X.max(axis=0, initial=0.0) <= 0.0)
    lopsided = np.nonzero(one_signed & ((in_ones == 0) != (in_zeros == 0)))[0]
    if lopsided.size:
        listed = ", ".join(
            f"{names[j]} ({max(in_ones[j], in_zeros[j]):,} events, all y = {1 if in_ones[j] else 0})" for j in lopsided
        )
        if l2 == 0.0:
            raise NoOptimumError(
                f"these features are present only in events of one outcome: {listed}; at L2 = 0 the log-likelihood "
                "has no maximum and their coefficients grow without bound; drop them, or give a small L2 penalty "
                "(for example --l2 1e-4)"
            )
        name(
            "one_outcome",
            lopsided.tolist(),
            "present only in events of one outcome, so without the L2 penalty their coefficients would grow "
            f"without bound; {penalty}: {listed}",
        )
    absent = [j for j in aliased if not present[:, j].any()]
    if absent:
        name(
            "absent",
            absent,
            "0 in every labelled event (absent, sent as 0, or only in scoring requests), so the data say nothing "
            f"of their coefficients, which the L2 penalty holds at 0: {', '.join(names[j] for j in absent)}",
        )
    tied = [j for j in aliased if j not in absent]
    if tied:
        name(
            "aliased",
            tied,
            "aliased (each a linear combination of the intercept and the features before it): the data fix "
            "only combinations of these coefficients with the intercept's and the others'; how they are split "
            "comes from the L2 penalty, so one coefficient's z and p-value mean little: "
            + ", ".join(names[j] for j in tied),
        )
    return tuple(found)
