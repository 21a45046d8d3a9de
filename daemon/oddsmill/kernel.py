"""The compiled update kernel: exact, sequential SGD over a block of events.

A block is a CSR-like batch: event e has features `idx[ptr[e]:ptr[e+1]]` (vocabulary slots) with raw
values `val[...]`, an operation `op[e]` (SCORE, TRAIN = score then learn, LEARN = learn a joined
outcome), a label and a weight. Events are processed one after another, exactly as if sent one by
one; the block only amortises the call.

The state lives in three arrays so that the kernel's signature stays short:
- `prm`, the settings record (float64, indices P_*), built once from `LearnerSettings`;
- `sc`, the scalar state (indices S_*): step, weight scale, intercept, averaging sums, ...;
- `sl`, per-slot rows (R_*, one column per vocabulary slot) and `fl`, per-slot flags (F_*).

Coordinates. A coefficient theta_j is kept in standardised units, x_std = (x - c_j) / s_j, where s_j
is the feature's standard deviation over its warm-up and c_j its mean while the feature is "centred"
(present in every learned event so far; the first event without it folds c_j into the intercept,
which is an exact change of coordinates). The model itself is always
logit = b + sum over present j of theta_j x_j / s_j, with absent features contributing nothing; the
centring only conditions the optimisation. While a feature's statistics are warming up they change,
and each change rewrites theta_j and the intercept so that every prediction is preserved exactly.

L2 without touching absent features. For the global schedules theta = ws * v with one scale ws for
all slots (Bottou's SGD code); the Polyak-Ruppert sum of the iterates is kept as u + A v (the scheme
of scikit-learn's averaged SGD), so a step costs time in proportion to the features present. When ws
falls under WS_FLOOR the scale is folded into v and A into u (O(vocabulary), rare). AdaGrad's rates
are per feature and fixed while a feature is absent, so its L2 decay and averaging are caught up
lazily in closed form from the step a feature was last touched.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

# settings record
P_SCHED, P_ETA0, P_L2, P_A, P_C, P_DELTA, P_AVG, P_AVG_START, P_SCALING, P_WARMUP = range(10)
N_PARAMS = 10
# scalar state
S_T, S_WS, S_B, S_A, S_SB, S_NAVG, S_GB, S_NCENT, S_STARTED, S_NCLIST, S_NSLOTS, S_RENORMS = range(12)
N_SCALARS = 12
# per-slot rows
R_V, R_U, R_G, R_LAST, R_MEAN, R_M2, R_COUNT, R_SCALE = range(8)
N_ROWS = 8
# per-slot flags
F_NUMERIC = np.uint8(1)
F_CENTERED = np.uint8(2)
# operations
OP_SCORE, OP_TRAIN, OP_LEARN = 0, 1, 2
# schedule codes (as in schedules.CODES)
SCH_CONSTANT, SCH_INVERSE, SCH_POWER, SCH_ADAGRAD = 0, 1, 2, 3

# Guards, one named constant each.
WS_FLOOR = 1e-3  # fold the scale in: the u + A v sums then lose at most ~3 digits to cancellation
CONSTANT_RTOL = 1e-9  # a feature whose sd is below this fraction of its mean is treated as constant


@njit(cache=True, inline="always")
def sigmoid(z: float) -> float:
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True, inline="always")
def _global_rate(prm: np.ndarray, t: float) -> float:
    sched = prm[P_SCHED]
    eta0 = prm[P_ETA0]
    if sched == SCH_CONSTANT:
        return eta0
    if sched == SCH_INVERSE:
        return eta0 / (1.0 + prm[P_L2] * eta0 * t)
    return eta0 * (1.0 + prm[P_A] * eta0 * t) ** (-prm[P_C])


@njit(cache=True, inline="always")
def _ada_rate(prm: np.ndarray, g_sum: float) -> float:
    return prm[P_ETA0] / (prm[P_DELTA] + math.sqrt(g_sum))


@njit(cache=True)
def _geom(r: float, i0: float, k: float) -> float:
    """sum of r**i for i = i0..k (0 when i0 > k)."""
    if i0 > k:
        return 0.0
    if r == 1.0:
        return k - i0 + 1.0
    return r**i0 * (1.0 - r ** (k - i0 + 1.0)) / (1.0 - r)


@njit(cache=True)
def _ada_lag(prm: np.ndarray, sc: np.ndarray, sl: np.ndarray, j: int) -> tuple[float, float]:
    """AdaGrad: theta_j and its iterate sum caught up to the current step, without writing them."""
    theta = sl[R_V, j]
    usum = sl[R_U, j]
    last = sl[R_LAST, j]
    k = sc[S_T] - last
    if k <= 0.0 or theta == 0.0:
        return theta, usum
    r = 1.0 - _ada_rate(prm, sl[R_G, j]) * prm[P_L2]
    if prm[P_AVG] != 0.0:
        i0 = max(1.0, prm[P_AVG_START] - last + 1.0)
        usum += theta * _geom(r, i0, k)
    return theta * r**k, usum


@njit(cache=True)
def _coef(prm: np.ndarray, sc: np.ndarray, sl: np.ndarray, j: int, averaged: bool) -> float:
    """theta_j in standardised units now: the current iterate, or the Polyak-Ruppert average."""
    if prm[P_SCHED] == SCH_ADAGRAD:
        theta, usum = _ada_lag(prm, sc, sl, j)
        if averaged:
            return usum / sc[S_NAVG]
        return theta
    if averaged:
        return (sl[R_U, j] + sc[S_A] * sl[R_V, j]) / sc[S_NAVG]
    return sc[S_WS] * sl[R_V, j]


@njit(cache=True, inline="always")
def _xstd(sl: np.ndarray, fl: np.ndarray, j: int, x: float) -> float:
    if fl[j] & F_CENTERED:
        return (x - sl[R_MEAN, j]) / sl[R_SCALE, j]
    return x / sl[R_SCALE, j]


@njit(cache=True)
def _logit(prm, sc, sl, fl, cl, idx, val, lo, hi, averaged):  # type: ignore[no-untyped-def]
    """The model's logit for one event, reading the state only."""
    z = sc[S_SB] / sc[S_NAVG] if averaged else sc[S_B]
    ncent = 0
    for k in range(lo, hi):
        j = idx[k]
        if fl[j] & F_CENTERED:
            ncent += 1
        z += _coef(prm, sc, sl, j, averaged) * _xstd(sl, fl, j, val[k])
    if ncent < sc[S_NCENT]:
        # a centred feature is absent: its share of the intercept does not apply
        for m in range(int(sc[S_NCLIST])):
            j = cl[m]
            if not (fl[j] & F_CENTERED) or _present(idx, lo, hi, j):
                continue
            z -= _coef(prm, sc, sl, j, averaged) * sl[R_MEAN, j] / sl[R_SCALE, j]
    return z


@njit(cache=True, inline="always")
def _present(idx: np.ndarray, lo: int, hi: int, j: int) -> bool:
    for k in range(lo, hi):
        if idx[k] == j:
            return True
    return False


@njit(cache=True)
def score_block(prm, sc, sl, fl, cl, ptr, idx, val, out):  # type: ignore[no-untyped-def]
    """Logits of every event of a block with the state as it is (scoring never changes state)."""
    averaged = prm[P_AVG] != 0.0 and sc[S_NAVG] > 0.0
    for e in range(ptr.shape[0] - 1):
        out[e] = _logit(prm, sc, sl, fl, cl, idx, val, ptr[e], ptr[e + 1], averaged)


@njit(cache=True)
def _reparam(prm, sc, sl, fl, j, new_center, new_scale):  # type: ignore[no-untyped-def]
    """Change feature j's centre and scale, rewriting theta_j and the intercept so that every
    prediction (of the iterate and of the average) is unchanged."""
    old_center = sl[R_MEAN, j] if fl[j] & F_CENTERED else 0.0
    old_scale = sl[R_SCALE, j]
    shift = (new_center - old_center) / old_scale
    ratio = new_scale / old_scale
    theta = _coef(prm, sc, sl, j, False)
    if prm[P_SCHED] == SCH_ADAGRAD:
        # the lag was caught up by the caller, so R_U is the iterate sum
        tsum = sl[R_U, j]
        sl[R_V, j] *= ratio
        sl[R_U, j] *= ratio
    else:
        tsum = sl[R_U, j] + sc[S_A] * sl[R_V, j]
        sl[R_V, j] *= ratio
        sl[R_U, j] *= ratio
    sc[S_B] += theta * shift
    sc[S_SB] += tsum * shift
    sl[R_SCALE, j] = new_scale


@njit(cache=True)
def _catch_up(prm, sc, sl, j):  # type: ignore[no-untyped-def]
    theta, usum = _ada_lag(prm, sc, sl, j)
    sl[R_V, j] = theta
    sl[R_U, j] = usum
    sl[R_LAST, j] = sc[S_T]


@njit(cache=True)
def _learn_one(prm, sc, sl, fl, cl, idx, val, lo, hi, y, w):  # type: ignore[no-untyped-def]
    ada = prm[P_SCHED] == SCH_ADAGRAD
    scaling = prm[P_SCALING] != 0.0
    t = sc[S_T]
    if ada:
        for k in range(lo, hi):
            _catch_up(prm, sc, sl, idx[k])
    # The centred set is fixed at the first learned event and only shrinks.
    if sc[S_STARTED] == 0.0:
        sc[S_STARTED] = 1.0
        if scaling:
            n = 0
            for k in range(lo, hi):
                j = idx[k]
                if fl[j] & F_NUMERIC:
                    fl[j] |= F_CENTERED
                    sl[R_MEAN, j] = 0.0  # centre starts at 0 and follows the warm-up mean
                    cl[n] = j
                    n += 1
            sc[S_NCLIST] = n
            sc[S_NCENT] = n
    if sc[S_NCENT] > 0.0:
        ncent = 0
        for k in range(lo, hi):
            if fl[idx[k]] & F_CENTERED:
                ncent += 1
        if ncent < sc[S_NCENT]:
            for m in range(int(sc[S_NCLIST])):
                j = cl[m]
                if (fl[j] & F_CENTERED) and not _present(idx, lo, hi, j):
                    if ada:
                        _catch_up(prm, sc, sl, j)
                    _reparam(prm, sc, sl, fl, j, 0.0, sl[R_SCALE, j])
                    fl[j] &= ~F_CENTERED
                    sc[S_NCENT] -= 1.0
    # Warm-up of the scaling statistics (Welford), preserving predictions.
    if scaling:
        for k in range(lo, hi):
            j = idx[k]
            if not (fl[j] & F_NUMERIC) or sl[R_COUNT, j] >= prm[P_WARMUP]:
                continue
            x = val[k]
            cnt = sl[R_COUNT, j] + 1.0
            delta = x - sl[R_MEAN, j]
            mean = sl[R_MEAN, j] + delta / cnt
            m2 = sl[R_M2, j] + delta * (x - mean)
            sd = math.sqrt(m2 / cnt)
            if sd > CONSTANT_RTOL * abs(mean):
                scale = sd
            elif mean != 0.0:
                scale = abs(mean)
            else:
                scale = 1.0
            new_center = mean if fl[j] & F_CENTERED else 0.0
            _reparam(prm, sc, sl, fl, j, new_center, scale)
            sl[R_MEAN, j] = mean
            sl[R_M2, j] = m2
            sl[R_COUNT, j] = cnt
    # The gradient step on the current iterate.
    z = _logit(prm, sc, sl, fl, cl, idx, val, lo, hi, False)
    g = w * (y - sigmoid(z))
    l2 = prm[P_L2]
    averaging = prm[P_AVG] != 0.0 and t >= prm[P_AVG_START]
    if ada:
        for k in range(lo, hi):
            j = idx[k]
            gj = g * _xstd(sl, fl, j, val[k])
            sl[R_G, j] += gj * gj
            eta_j = _ada_rate(prm, sl[R_G, j])
            sl[R_V, j] += eta_j * (gj - l2 * sl[R_V, j])
            if averaging:
                sl[R_U, j] += sl[R_V, j]
            sl[R_LAST, j] = t + 1.0
        sc[S_GB] += g * g
        sc[S_B] += _ada_rate(prm, sc[S_GB]) * g
    else:
        eta = _global_rate(prm, t)
        sc[S_WS] *= 1.0 - eta * l2
        ws = sc[S_WS]
        a_sum = sc[S_A]
        for k in range(lo, hi):
            j = idx[k]
            d = eta * g * _xstd(sl, fl, j, val[k]) / ws
            sl[R_V, j] += d
            sl[R_U, j] -= a_sum * d
        sc[S_B] += eta * g
        if averaging:
            sc[S_A] += ws
        if ws < WS_FLOOR:
            a_sum = sc[S_A]
            for j in range(int(sc[S_NSLOTS])):
                sl[R_U, j] += a_sum * sl[R_V, j]
                sl[R_V, j] *= ws
            sc[S_A] = 0.0
            sc[S_WS] = 1.0
            sc[S_RENORMS] += 1.0
    if averaging:
        sc[S_SB] += sc[S_B]
        sc[S_NAVG] += 1.0
    sc[S_T] = t + 1.0


@njit(cache=True)
def learn_block(prm, sc, sl, fl, cl, ptr, idx, val, op, y, w, out):  # type: ignore[no-untyped-def]
    """Run a block in order. `out[e]` gets the published logit of SCORE and TRAIN events (scored
    with the state before the event is learned: progressive validation) and NaN for LEARN ones."""
    for e in range(ptr.shape[0] - 1):
        lo = ptr[e]
        hi = ptr[e + 1]
        if op[e] != OP_LEARN:
            averaged = prm[P_AVG] != 0.0 and sc[S_NAVG] > 0.0
            out[e] = _logit(prm, sc, sl, fl, cl, idx, val, lo, hi, averaged)
        else:
            out[e] = np.nan
        if op[e] != OP_SCORE:
            _learn_one(prm, sc, sl, fl, cl, idx, val, lo, hi, y[e], w[e])
