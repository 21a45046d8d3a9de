"""The compiled update kernel: exact, sequential SGD over a block of events.

A block is a CSR-like batch: event e has features `idx[ptr[e]:ptr[e+1]]` (vocabulary slots) with raw
values `val[...]`, an operation `op[e]` (SCORE, TRAIN = score then learn, LEARN = learn a joined
outcome), a label and a weight. Events are processed one after another, exactly as if sent one by
one; the block only amortises the call.

The state lives in a few arrays so that the kernel's signature stays short:
- `prm`, the settings record (float64, indices P_*), built once from `LearnerSettings`;
- `sc`, the scalar state (indices S_*): step, weight scale, intercept, averaging sums, ...;
- `sl`, per-slot values (one short row per vocabulary slot, columns R_*: 24 bytes, 40 for
  AdaGrad), and `fl`, per-slot flags (F_*);
- `dt`, the detail rows (D_*) of the slots whose warm-up statistics are not implied by their
  count (below: most slots of a large vocabulary are ids and categories, which never need one);
- `cl`, the centred set, and `wq`, the warm-up queue (slot, first step) of open windows.

Coordinates. The model is always logit = b + sum over present j of theta_j x_j / s_j: an absent
feature contributes nothing. theta_j is in standardised units: s_j comes from the feature's first
P_WARMUP present values (see `_scale`: their standard deviation, tempered while they are few; 1 for
a one-hot). While these statistics warm up they
change, and each change rewrites theta_j so that every prediction is preserved exactly.
The optimisation runs in centred coordinates, which is what makes it converge on features whose mean
is far from 0 (an uncentred feature is nearly collinear with the intercept): when a feature's
warm-up window (P_WARMUP learned events from its first) ends and it was present in at least
CENTRE_MIN_SHARE of them, it joins the centred set; from then on its centre c_j follows its mean
over every learned event since its first (absent counted as 0; brought up to date every
CENTRE_PERIOD steps), so that a feature first seen in an unusual week is not centred on that week
for ever. Every move of c_j is absorbed by the intercept (b += theta_j dc / s_j), an exact change of
coordinates; the intercept is not penalised, so the objective and its optimum do not depend on the
centres at all. Members of the centred set (at most P_MAX_CENTRED) are "dense": absent, their value
is 0, so (0 - c_j) / s_j, and they are updated at every step. A step costs O(centred + present).

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
from llvmlite import ir
from numba import njit, types
from numba.core import cgutils
from numba.extending import intrinsic

# The entry points release the GIL (nogil): a race's candidates run their kernels on other threads,
# each on a state of its own. Every function is compiled with error_model="numpy": a division by
# zero gives inf or NaN instead of raising, which spares each call an exception check (measured:
# 35 ns a call otherwise). The kernel never divides by a value that can be 0: scales are > 0, and
# the averaged weights are read only when the count of averaged steps is > 0.

# settings record
(
    P_SCHED,
    P_ETA0,
    P_L2,
    P_A,
    P_C,
    P_DELTA,
    P_AVG,
    P_AVG_START,
    P_SCALING,
    P_WARMUP,
    P_MAX_CENTRED,
    P_QUIET_RUNS,
    P_DETAIL_ALL,
) = range(13)
N_PARAMS = 13
# scalar state (S_NDETAIL: detail rows in use; not in checkpoints, which hold full rows)
S_T, S_WS, S_B, S_A, S_SB, S_NAVG, S_GB, S_NCENT, S_QHEAD, S_QLEN, S_NSLOTS, S_RENORMS, S_NDETAIL = range(13)
N_SCALARS = 13
N_SCALARS_SAVED = 12
# Every slot has a short row in `sl` (R_*): its coefficient's two sums, and R_AUX. AdaGrad's two
# columns (its sum of squared gradients, the step a slot was last caught up at) come last, and only
# AdaGrad's rows have them. A slot whose learned values have all been 1 (a one-hot, an id, a flag)
# needs nothing else: its warm-up statistics follow from how often it was learned (the mean of its
# values 1, their M2 0, its scale 1), so R_AUX is that count, which is also the sum of its values.
# At its first learned value other than 1, or when it is centred, or when a quiet run takes it, it
# gets a detail row in `dt` (D_*, F_DETAIL set) with those statistics written out, and R_AUX
# becomes the row's index. The step at which a slot was first learned lives in the warm-up queue
# (`wq`: slot, first step) while its window is open, and in its detail row once it is centred.
R_V, R_U, R_AUX, R_G, R_LAST = range(5)
N_ROWS = 5  # AdaGrad's row
N_ROWS_GLOBAL = 3  # the global schedules' row
D_MEAN, D_M2, D_COUNT, D_SCALE, D_FIRST, D_DPOS, D_SUM = range(7)
N_DETAIL = 7
# per-slot flags
F_NUMERIC = np.uint8(1)
F_CENTERED = np.uint8(2)
F_SEEN = np.uint8(4)  # learned at least once (its warm-up window has begun)
F_DETAIL = np.uint8(8)  # has a detail row (R_AUX is its index)
# operations
OP_SCORE, OP_TRAIN, OP_LEARN = 0, 1, 2
# schedule codes (as in schedules.CODES)
SCH_CONSTANT, SCH_INVERSE, SCH_POWER, SCH_ADAGRAD = 0, 1, 2, 3

# Guards, one named constant each.
WS_FLOOR = 1e-3  # fold the scale in: the u + A v sums then lose at most ~3 digits to cancellation
CONSTANT_RTOL = 1e-9  # a feature whose sd is below this fraction of its mean is constant so far
CENTRE_PERIOD = 1024  # centres follow their running means, brought up to date this often (steps)
CENTRE_MIN_SHARE = 0.01  # centred only if present in at least this share of its warm-up window
QUIET_MIN_EVENTS = 4  # events of a block sharing their slots go to _quiet_run from this many on


@intrinsic
def _prefetch(typingctx, arr, k):  # type: ignore[no-untyped-def]
    """Ask the processor to start loading the cache line of arr's k-th element (flat index, C
    order) for writing: LLVM's prefetch, which never faults and changes nothing."""

    def codegen(context, builder, signature, args):  # type: ignore[no-untyped-def]
        data = context.make_array(signature.args[0])(context, builder, args[0]).data
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        ptr = builder.bitcast(builder.gep(data, [args[1]]), i8p)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")  # type: ignore[no-untyped-call]
        builder.call(fn, [ptr, i32(1), i32(3), i32(1)])  # write, keep in all caches, data
        return context.get_dummy_value()

    return types.void(arr, k), codegen


@njit(cache=True, error_model="numpy", inline="always")
def _prefetch_slots(sl, fl, idx, lo, hi):  # type: ignore[no-untyped-def]
    """Start loading the slots of an event (every cache line of each row, and its flags) while
    the events before it run: at 1e6 slots each is a miss to memory, and a step waited on them."""
    width = sl.shape[1]
    for k in range(lo, hi):
        j = idx[k]
        # a row's 24 or 40 bytes meet one or two cache lines of 64: its first and last elements
        # are one in each (a detail row belongs to a frequent slot, in cache already)
        _prefetch(sl, j * width)  # type: ignore[call-arg]
        _prefetch(sl, j * width + width - 1)
        _prefetch(fl, j)


@njit(cache=True, error_model="numpy", inline="always")
def _prefetch_details(sl, fl, dt, idx, lo, hi):  # type: ignore[no-untyped-def]
    """Start loading the detail rows of an event's slots (56 bytes: its first and last elements),
    once their short rows are in cache (prefetched an event earlier): a second random access a
    numeric slot, which a vocabulary of a million numeric names made a miss each."""
    for k in range(lo, hi):
        j = idx[k]
        if fl[j] & F_DETAIL:
            d = int(sl[j, R_AUX])
            _prefetch(dt, d * N_DETAIL)  # type: ignore[call-arg]
            _prefetch(dt, d * N_DETAIL + N_DETAIL - 1)


@njit(cache=True, error_model="numpy", inline="always")
def sigmoid(z: float) -> float:
    if z >= 0.0:
        return 1.0 / (1.0 + math.exp(-z))
    e = math.exp(z)
    return e / (1.0 + e)


@njit(cache=True, error_model="numpy", inline="always")
def _global_rate(prm: np.ndarray, t: float) -> float:
    sched = prm[P_SCHED]
    eta0 = float(prm[P_ETA0])
    if sched == SCH_CONSTANT:
        return float(eta0)
    if sched == SCH_INVERSE:
        return eta0 / (1.0 + float(prm[P_L2]) * eta0 * t)
    return float(eta0 * (1.0 + float(prm[P_A]) * eta0 * t) ** (-float(prm[P_C])))


@njit(cache=True, error_model="numpy", inline="always")
def _ada_rate(prm: np.ndarray, g_sum: float) -> float:
    return float(prm[P_ETA0] / (prm[P_DELTA] + math.sqrt(g_sum)))


@njit(cache=True, error_model="numpy")
def _geom(r: float, i0: float, k: float) -> float:
    """sum of r**i for i = i0..k (0 when i0 > k)."""
    if i0 > k:
        return 0.0
    if r == 1.0:
        return k - i0 + 1.0
    return float(r**i0 * (1.0 - r ** (k - i0 + 1.0)) / (1.0 - r))


@njit(cache=True, error_model="numpy", inline="always")
def _ada_lag(prm: np.ndarray, sc: np.ndarray, sl: np.ndarray, j: int) -> tuple[float, float]:
    """AdaGrad: theta_j and its iterate sum caught up to the current step, without writing them."""
    theta = sl[j, R_V]
    usum = sl[j, R_U]
    last = sl[j, R_LAST]
    k = sc[S_T] - last
    if k <= 0.0 or theta == 0.0:
        return theta, usum
    r = 1.0 - _ada_rate(prm, sl[j, R_G]) * prm[P_L2]
    if prm[P_AVG] != 0.0:
        i0 = max(1.0, prm[P_AVG_START] - last + 1.0)
        usum += theta * _geom(r, i0, k)
    return theta * r**k, usum


@njit(cache=True, error_model="numpy", inline="always")
def _coef_global(prm, sc, sl, j, averaged):  # type: ignore[no-untyped-def]
    """theta_j in standardised units now (global schedules): ws v_j, or (u_j + A v_j) / n."""
    if averaged:
        return (sl[j, R_U] + sc[S_A] * sl[j, R_V]) / sc[S_NAVG]
    return sc[S_WS] * sl[j, R_V]


@njit(cache=True, error_model="numpy")
def _coef_ada(prm, sc, sl, j, averaged):  # type: ignore[no-untyped-def]
    """theta_j in standardised units now (AdaGrad): caught up in closed form, without writing."""
    theta, usum = _ada_lag(prm, sc, sl, j)
    if averaged:
        return usum / sc[S_NAVG]
    return theta


@njit(cache=True, error_model="numpy", inline="always")
def _xstd(sl: np.ndarray, fl: np.ndarray, dt: np.ndarray, j: int, x: float) -> float:
    """x in the slot's standardised units. A slot without a detail row has centre 0 and scale 1,
    and x / 1.0 is x, bit for bit."""
    f = fl[j]
    if f & F_DETAIL:
        d = int(sl[j, R_AUX])
        if f & F_CENTERED:
            return float((x - dt[d, D_MEAN]) / dt[d, D_SCALE])
        return float(x / dt[d, D_SCALE])
    return float(x)


@njit(cache=True, error_model="numpy", inline="always")
def _dpos(sl, dt, j):  # type: ignore[no-untyped-def]
    """A centred slot's position in the centred set."""
    return int(dt[int(sl[j, R_AUX]), D_DPOS])


@njit(cache=True, error_model="numpy")
def _gather(sl, fl, dt, idx, val, lo, hi, dx):  # type: ignore[no-untyped-def]
    """Put the values of the present centred features into dx (by position in the centred set)."""
    for k in range(lo, hi):
        j = idx[k]
        if fl[j] & F_CENTERED:
            dx[_dpos(sl, dt, j)] = val[k]


@njit(cache=True, error_model="numpy")
def _clear(sl, fl, dt, idx, lo, hi, dx):  # type: ignore[no-untyped-def]
    for k in range(lo, hi):
        j = idx[k]
        if fl[j] & F_CENTERED:
            dx[_dpos(sl, dt, j)] = 0.0


@njit(cache=True, error_model="numpy")
def _logit_global(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged):  # type: ignore[no-untyped-def]
    """The model's logit for one event (global schedules), reading the state only. `dx` holds the
    values of the centred features (0 where absent). The standardised values go to xs, in the
    order of the update's loop (the centred set, then the event's others at ncent + their place),
    which reads them from there: the state's scales have not changed in between."""
    z = sc[S_SB] / sc[S_NAVG] if averaged else sc[S_B]
    ncent = int(sc[S_NCENT])
    for m in range(ncent):
        j = cl[m]
        x = xs[m] = _xstd(sl, fl, dt, j, dx[m])
        z += _coef_global(prm, sc, sl, j, averaged) * x
    for k in range(lo, hi):
        j = idx[k]
        if not (fl[j] & F_CENTERED):
            x = xs[ncent + k - lo] = _xstd(sl, fl, dt, j, val[k])
            z += _coef_global(prm, sc, sl, j, averaged) * x
    return z


@njit(cache=True, error_model="numpy")
def _logit_ada(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged):  # type: ignore[no-untyped-def]
    """_logit_global for AdaGrad. Two copies because numba compiles the per-feature loop ten times
    slower when a call to AdaGrad's catch-up sits in it, even untaken (measured)."""
    z = sc[S_SB] / sc[S_NAVG] if averaged else sc[S_B]
    ncent = int(sc[S_NCENT])
    for m in range(ncent):
        j = cl[m]
        x = xs[m] = _xstd(sl, fl, dt, j, dx[m])
        z += _coef_ada(prm, sc, sl, j, averaged) * x
    for k in range(lo, hi):
        j = idx[k]
        if not (fl[j] & F_CENTERED):
            x = xs[ncent + k - lo] = _xstd(sl, fl, dt, j, val[k])
            z += _coef_ada(prm, sc, sl, j, averaged) * x
    return z


@njit(cache=True, error_model="numpy")
def _logit_pair(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs):  # type: ignore[no-untyped-def]
    """(averaged logit, current logit) in one pass (global schedules, averaging under way). The
    current one is summed in the order of _logit_global, so it is bit-identical to it; xs as
    there."""
    n = sc[S_NAVG]
    ws = sc[S_WS]
    a_sum = sc[S_A]
    za = sc[S_SB] / n
    zc = sc[S_B]
    ncent = int(sc[S_NCENT])
    for m in range(ncent):
        j = cl[m]
        x = xs[m] = _xstd(sl, fl, dt, j, dx[m])
        za += (sl[j, R_U] + a_sum * sl[j, R_V]) / n * x
        zc += ws * sl[j, R_V] * x
    for k in range(lo, hi):
        j = idx[k]
        if not (fl[j] & F_CENTERED):
            x = xs[ncent + k - lo] = _xstd(sl, fl, dt, j, val[k])
            za += (sl[j, R_U] + a_sum * sl[j, R_V]) / n * x
            zc += ws * sl[j, R_V] * x
    return za, zc


@njit(cache=True, error_model="numpy")
def _logit(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged):  # type: ignore[no-untyped-def]
    if prm[P_SCHED] == SCH_ADAGRAD:
        return _logit_ada(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged)
    return _logit_global(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged)


@njit(cache=True, error_model="numpy", inline="always")
def _scratch(prm, ptr):  # type: ignore[no-untyped-def]
    """The two work arrays of a block: dx (the centred set's values) and xs (an event's
    standardised values, the centred set's first)."""
    kmax = 0
    for e in range(ptr.shape[0] - 1):
        kmax = max(kmax, ptr[e + 1] - ptr[e])
    return np.zeros(max(1, int(prm[P_MAX_CENTRED]))), np.empty(int(prm[P_MAX_CENTRED]) + kmax + 1)


@njit(cache=True, error_model="numpy", nogil=True)
def score_block(prm, sc, sl, fl, cl, dt, ptr, idx, val, out):  # type: ignore[no-untyped-def]
    """Logits of every event of a block with the state as it is (scoring never changes state)."""
    averaged = prm[P_AVG] != 0.0 and sc[S_NAVG] > 0.0
    dx, xs = _scratch(prm, ptr)
    for e in range(ptr.shape[0] - 1):
        lo, hi = ptr[e], ptr[e + 1]
        if sc[S_NCENT] > 0.0:
            _gather(sl, fl, dt, idx, val, lo, hi, dx)
        out[e] = _logit(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged)
        if sc[S_NCENT] > 0.0:
            _clear(sl, fl, dt, idx, lo, hi, dx)


@njit(cache=True, error_model="numpy", inline="always")
def _scale(mean: float, m2: float, n: float) -> float:
    """A feature's scale from n present values: sqrt(sd^2 + mean^2 / n). For the first value it is
    |x| (so x / s = 1), and it tends to the standard deviation as n grows; an estimate from a few
    nearly equal values cannot blow x / s up (|x / s| stays near sqrt(n) at most). A feature constant
    so far has scale |mean| (1 when it is 0)."""
    var = m2 / n
    if var <= (CONSTANT_RTOL * mean) ** 2:  # constant so far (a one-hot is always 1)
        return abs(mean) if mean != 0.0 else 1.0
    return math.sqrt(var + mean * mean / n)


@njit(cache=True, error_model="numpy")
def _reparam(prm, sc, sl, fl, dt, j, d, new_center, new_scale):  # type: ignore[no-untyped-def]
    """Change feature j's centre and scale (its detail row is d), rewriting theta_j and the
    intercept so that every prediction (of the iterate and of the average) is unchanged. AdaGrad's
    lag must be caught up."""
    old_center = dt[d, D_MEAN] if fl[j] & F_CENTERED else 0.0
    old_scale = dt[d, D_SCALE]
    shift = (new_center - old_center) / old_scale
    ratio = new_scale / old_scale
    # For AdaGrad ws stays 1 and A stays 0, so these read both families (branch-free: a call to
    # AdaGrad's catch-up here slowed the warm-up loop tenfold).
    theta = sc[S_WS] * sl[j, R_V]
    tsum = sl[j, R_U] + sc[S_A] * sl[j, R_V]
    sl[j, R_V] *= ratio
    sl[j, R_U] *= ratio
    sc[S_B] += theta * shift
    sc[S_SB] += tsum * shift
    dt[d, D_SCALE] = new_scale


@njit(cache=True, error_model="numpy", inline="always")
def _reparam_unit(sc, sl, j):  # type: ignore[no-untyped-def]
    """`_reparam` of a slot without a detail row to its own centre 0 and scale 1 (a warm-up step
    on a value of 1): shift 0.0 and ratio 1.0, so theta_j stays as it is and the intercepts add
    theta * 0.0, as `_reparam` adds (which leaves them as they are unless theta is not finite)."""
    theta = sc[S_WS] * sl[j, R_V]
    tsum = sl[j, R_U] + sc[S_A] * sl[j, R_V]
    sc[S_B] += theta * 0.0
    sc[S_SB] += tsum * 0.0


@njit(cache=True, error_model="numpy")
def _promote(prm, sc, sl, fl, dt, j):  # type: ignore[no-untyped-def]
    """Give slot j a detail row, with the statistics its count implies (n values of 1: mean 1,
    M2 0, count min(n, warm-up), scale 1, sum n). The caller made room in dt."""
    n = sl[j, R_AUX]
    d = int(sc[S_NDETAIL])
    sc[S_NDETAIL] = d + 1.0
    dt[d, D_MEAN] = 1.0 if n > 0.0 else 0.0
    dt[d, D_M2] = 0.0
    dt[d, D_COUNT] = min(n, prm[P_WARMUP])
    dt[d, D_SCALE] = 1.0
    dt[d, D_FIRST] = 0.0
    dt[d, D_DPOS] = -1.0
    dt[d, D_SUM] = n
    sl[j, R_AUX] = d
    fl[j] |= F_DETAIL


@njit(cache=True, error_model="numpy", inline="always")
def _count(prm, sl, fl, dt, j):  # type: ignore[no-untyped-def]
    """The count of the slot's values its warm-up statistics hold."""
    if fl[j] & F_DETAIL:
        return float(dt[int(sl[j, R_AUX]), D_COUNT])
    return float(min(sl[j, R_AUX], prm[P_WARMUP]))


@njit(cache=True, error_model="numpy")
def _catch_up(prm, sc, sl, j):  # type: ignore[no-untyped-def]
    theta, usum = _ada_lag(prm, sc, sl, j)
    sl[j, R_V] = theta
    sl[j, R_U] = usum
    sl[j, R_LAST] = sc[S_T]


@njit(cache=True, error_model="numpy")
def _end_warmups(prm, sc, sl, fl, dt, cl, wq):  # type: ignore[no-untyped-def]
    """Features whose warm-up window (P_WARMUP learned events from their first) ends at this step:
    centre the frequent ones, with their mean over the window (absent counted as 0)."""
    t = sc[S_T]
    window = prm[P_WARMUP]
    joined = False
    while sc[S_QHEAD] < sc[S_QLEN]:
        q = int(sc[S_QHEAD])
        j = int(wq[q, 0])
        first = wq[q, 1]
        if first + window > t:
            break
        sc[S_QHEAD] += 1.0
        if _count(prm, sl, fl, dt, j) < CENTRE_MIN_SHARE * window or sc[S_NCENT] >= prm[P_MAX_CENTRED]:
            continue
        if prm[P_SCHED] == SCH_ADAGRAD:
            _catch_up(prm, sc, sl, j)
        if not (fl[j] & F_DETAIL):
            _promote(prm, sc, sl, fl, dt, j)
        d = int(sl[j, R_AUX])
        dt[d, D_FIRST] = first
        centre = dt[d, D_SUM] / (t - first)
        _reparam(prm, sc, sl, fl, dt, j, d, centre, dt[d, D_SCALE])
        fl[j] |= F_CENTERED
        dt[d, D_MEAN] = centre
        m = int(sc[S_NCENT])
        cl[m] = j
        dt[d, D_DPOS] = m
        sc[S_NCENT] = m + 1.0
        joined = True
    return joined


@njit(cache=True, error_model="numpy")
def _learn_one(prm, sc, sl, fl, dt, cl, wq, idx, val, lo, hi, y, w, dx, xs, z_hint, gathered):  # type: ignore[no-untyped-def]
    """One step. `z_hint` is the current logit when the caller has it (NaN otherwise), with dx
    gathered and xs filled by the logit's pass; it is used when no change of coordinates happens in
    this step (bit-identical then)."""
    ada = prm[P_SCHED] == SCH_ADAGRAD
    t = sc[S_T]
    changed = False
    if ada:
        for k in range(lo, hi):
            _catch_up(prm, sc, sl, idx[k])
    if prm[P_SCALING] != 0.0:
        changed = _end_warmups(prm, sc, sl, fl, dt, cl, wq)
        # a centred feature's centre is its mean over every learned event since its first,
        # brought up to date every CENTRE_PERIOD steps
        for m in range(int(sc[S_NCENT]) if t % CENTRE_PERIOD == 0 else 0):
            j = cl[m]
            d = int(sl[j, R_AUX])
            centre = dt[d, D_SUM] / (t - dt[d, D_FIRST])
            if centre != dt[d, D_MEAN]:
                changed = True
                if ada:
                    _catch_up(prm, sc, sl, j)
                _reparam(prm, sc, sl, fl, dt, j, d, centre, dt[d, D_SCALE])
                dt[d, D_MEAN] = centre
        detail_all = prm[P_DETAIL_ALL] != 0.0
        for k in range(lo, hi):
            j = idx[k]
            x = val[k]
            if not (fl[j] & F_DETAIL) and (x != 1.0 or detail_all):
                _promote(prm, sc, sl, fl, dt, j)
            if not (fl[j] & F_SEEN):
                fl[j] |= F_SEEN
                q = int(sc[S_QLEN])
                wq[q, 0] = j
                wq[q, 1] = t
                sc[S_QLEN] = q + 1.0
            if not (fl[j] & F_DETAIL):  # x is 1: the count is the sum
                n = sl[j, R_AUX]
                sl[j, R_AUX] = n + 1.0
                if n < prm[P_WARMUP]:
                    changed = True
                    _reparam_unit(sc, sl, j)
                continue
            d = int(sl[j, R_AUX])
            dt[d, D_SUM] += x
            if (fl[j] & F_CENTERED) or dt[d, D_COUNT] >= prm[P_WARMUP]:
                continue
            # Welford's running mean and variance of the feature's present values
            cnt = dt[d, D_COUNT] + 1.0
            delta = x - dt[d, D_MEAN]
            mean = dt[d, D_MEAN] + delta / cnt
            m2 = dt[d, D_M2] + delta * (x - mean)
            scale = _scale(mean, m2, cnt)
            changed = True
            _reparam(prm, sc, sl, fl, dt, j, d, 0.0, scale)
            dt[d, D_MEAN] = mean
            dt[d, D_M2] = m2
            dt[d, D_COUNT] = cnt
    if changed or not gathered or z_hint != z_hint:
        if sc[S_NCENT] > 0.0:
            _gather(sl, fl, dt, idx, val, lo, hi, dx)
        z = _logit(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, False)
    else:
        z = z_hint
    g = w * (y - sigmoid(z))
    l2 = prm[P_L2]
    averaging = prm[P_AVG] != 0.0 and t >= prm[P_AVG_START]
    ncent = int(sc[S_NCENT])
    # The two update loops walk the same inputs (centred features, then the other present ones),
    # whose standardised values the last logit's pass left in xs.
    if ada:
        for m in range(ncent + (hi - lo)):
            if m < ncent:
                j = cl[m]
            else:
                j = idx[lo + m - ncent]
                if fl[j] & F_CENTERED:
                    continue
            gj = g * xs[m]
            sl[j, R_G] += gj * gj
            eta_j = _ada_rate(prm, sl[j, R_G])
            sl[j, R_V] += eta_j * (gj - l2 * sl[j, R_V])
            if averaging:
                sl[j, R_U] += sl[j, R_V]
            sl[j, R_LAST] = t + 1.0
        sc[S_GB] += g * g
        sc[S_B] += _ada_rate(prm, sc[S_GB]) * g
    else:
        eta = _global_rate(prm, t)
        sc[S_WS] *= 1.0 - eta * l2
        ws = sc[S_WS]
        a_sum = sc[S_A]
        for m in range(ncent + (hi - lo)):
            if m < ncent:
                j = cl[m]
            else:
                j = idx[lo + m - ncent]
                if fl[j] & F_CENTERED:
                    continue
            d = eta * g * xs[m] / ws
            sl[j, R_V] += d
            sl[j, R_U] -= a_sum * d
        sc[S_B] += eta * g
        if averaging:
            sc[S_A] += ws
        if ws < WS_FLOOR:
            a_sum = sc[S_A]
            for j in range(int(sc[S_NSLOTS])):
                sl[j, R_U] += a_sum * sl[j, R_V]
                sl[j, R_V] *= ws
            sc[S_A] = 0.0
            sc[S_WS] = 1.0
            sc[S_RENORMS] += 1.0
    if sc[S_NCENT] > 0.0:
        _clear(sl, fl, dt, idx, lo, hi, dx)
    if averaging:
        sc[S_SB] += sc[S_B]
        sc[S_NAVG] += 1.0
    sc[S_T] = t + 1.0


@njit(cache=True, error_model="numpy", inline="always")
def _event(prm, sc, sl, fl, dt, cl, wq, idx, val, lo, hi, op, y, w, dx, xs, ada):  # type: ignore[no-untyped-def]
    """One event of a block (features idx[lo:hi] with values val[lo:hi]); returns its published
    logit (scored with the state before it is learned: progressive validation), NaN for LEARN."""
    if op == OP_LEARN:
        _learn_one(prm, sc, sl, fl, dt, cl, wq, idx, val, lo, hi, y, w, dx, xs, np.nan, False)
        return np.nan
    averaged = prm[P_AVG] != 0.0 and sc[S_NAVG] > 0.0
    if sc[S_NCENT] > 0.0:
        _gather(sl, fl, dt, idx, val, lo, hi, dx)
    z_cur = np.nan
    if averaged and not ada and op == OP_TRAIN:
        z, z_cur = _logit_pair(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs)
    else:
        z = _logit(prm, sc, sl, fl, dt, cl, idx, val, lo, hi, dx, xs, averaged)
        if not averaged:
            z_cur = z
    if op == OP_TRAIN:
        _learn_one(prm, sc, sl, fl, dt, cl, wq, idx, val, lo, hi, y, w, dx, xs, z_cur, True)
    elif sc[S_NCENT] > 0.0:
        _clear(sl, fl, dt, idx, lo, hi, dx)
    return z


@njit(cache=True, error_model="numpy")
def _quiet_run(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, w, out, e0):  # type: ignore[no-untyped-def]
    """Events e0, e0 + 1, ... of rows that share their slots (row e has the values rows[e] at
    `slots`, weight w[e]), run on copies of their slots' state in small dense arrays for as long
    as the steps are quiet: a global schedule, every slot of the row past its warm-up (seen, and
    centred or with its statistics frozen), no warm-up window ending, no centre update, no fold of
    the weight scale. Each step is then the arithmetic of `_event` and `_learn_one` when nothing
    changes coordinates, with the same expressions in the same order (the logit sums the centred
    set, then the row's other slots in row order), so the state is bit-identical. The slots must be
    distinct, as encoding makes them. With scaling, the run gives every slot of the row a detail
    row first, so that the values need no check (the caller made room for them). Returns the first event not
    run; the caller runs that one with `_event`, which may change coordinates, and comes back."""
    m, k = rows.shape
    if prm[P_SCHED] == SCH_ADAGRAD or e0 >= m:
        return e0
    scaling = prm[P_SCALING] != 0.0
    ncent = int(sc[S_NCENT]) if scaling else 0
    t = sc[S_T]
    l2 = prm[P_L2]
    ws = sc[S_WS]
    # The first step at which a learned event is not quiet: a warm-up window ends (the queue is in
    # order of first steps, and no slot joins it during the run) or the centres are brought up to
    # date (every CENTRE_PERIOD steps).
    t_lim = np.inf
    if scaling:
        for c in range(k):
            j = slots[c]
            if not (fl[j] & F_SEEN) or (not (fl[j] & F_CENTERED) and _count(prm, sl, fl, dt, j) < prm[P_WARMUP]):
                return e0
        if sc[S_QHEAD] < sc[S_QLEN]:
            t_lim = wq[int(sc[S_QHEAD]), 1] + prm[P_WARMUP]
        if ncent > 0:
            t_lim = min(t_lim, float(CENTRE_PERIOD * math.ceil(t / CENTRE_PERIOD)))
    if op[e0] != OP_SCORE and (t >= t_lim or ws * (1.0 - _global_rate(prm, t) * l2) < WS_FLOOR):
        return e0
    for c in range(k if scaling else 0):
        if not (fl[slots[c]] & F_DETAIL):
            _promote(prm, sc, sl, fl, dt, slots[c])
    # The coordinates: the centred set in its order, then the row's other slots in row order.
    # col[a] is coordinate a's column in the row (-1: a centred slot absent from it, value 0).
    jj = np.empty(ncent + k, np.int64)
    col = np.full(ncent + k, -1, np.int64)
    cen = np.zeros(ncent + k)
    scl = np.empty(ncent + k)
    v = np.empty(ncent + k)
    u = np.empty(ncent + k)
    xs = np.empty(ncent + k)
    xr = np.empty(ncent + k)
    ta = np.empty(ncent + k)
    tc = np.empty(ncent + k)
    jj[:ncent] = cl[:ncent]
    n = ncent  # coordinates in use
    for c in range(k):
        j = slots[c]
        if fl[j] & F_CENTERED:
            col[_dpos(sl, dt, j)] = c
        else:
            jj[n] = j
            col[n] = c
            n += 1
    for a in range(n):
        j = jj[a]
        d = int(sl[j, R_AUX])
        if fl[j] & F_CENTERED:
            cen[a] = dt[d, D_MEAN]  # (x - 0.0) is x exactly, so the other slots share the formula
        scl[a] = dt[d, D_SCALE] if fl[j] & F_DETAIL else 1.0  # (without scaling, none has a detail row)
        v[a] = sl[j, R_V]
        u[a] = sl[j, R_U]
    sums = np.empty(k)
    for c in range(k if scaling else 0):
        sums[c] = dt[int(sl[slots[c], R_AUX]), D_SUM]
    b, a_sum, sb, navg = sc[S_B], sc[S_A], sc[S_SB], sc[S_NAVG]
    avg_on = prm[P_AVG] != 0.0
    # When the coordinates are the row's columns in their order (the commonest case: a stream's
    # numeric names always sent in one order, every one of them centred or none), a row's values
    # are read where they lie, in vector loads, rather than gathered one by one through col, and
    # added to the slots' sums as they are read: the same values and sums, 16% and then 7% less
    # time a row (DEVELOPERS.md, thirteenth session).
    in_order = n == k
    for a in range(n):
        if col[a] != a:
            in_order = False
    eta = ws_next = 0.0
    e = e0
    while e < m:
        o = op[e]
        if o != OP_SCORE:
            if t >= t_lim:
                break
            eta = _global_rate(prm, t)
            ws_next = ws * (1.0 - eta * l2)
            if ws_next < WS_FLOOR:
                break
        # Each loop below is elementwise over the coordinates (so it is compiled to vector
        # instructions) except the two sums, which keep their order.
        if in_order:
            r = rows[e]
            for a in range(n):
                xs[a] = (r[a] - cen[a]) / scl[a]
            if scaling and o != OP_SCORE:  # (nothing stops a row between here and its learning)
                for a in range(n):
                    sums[a] += r[a]
        else:
            for a in range(n):
                xr[a] = rows[e, col[a]] if col[a] >= 0 else 0.0
            for a in range(n):
                xs[a] = (xr[a] - cen[a]) / scl[a]
        for a in range(n):
            tc[a] = ws * v[a] * xs[a]
        zc = b
        if avg_on and navg > 0.0:  # the published logit is the averaged one
            for a in range(n):
                ta[a] = (u[a] + a_sum * v[a]) / navg * xs[a]
            za = sb / navg
            for a in range(n):  # one loop, so that the two chains of additions overlap
                za += ta[a]
                zc += tc[a]
            out[e] = za if o != OP_LEARN else np.nan
        else:
            for a in range(n):
                zc += tc[a]
            out[e] = zc if o != OP_LEARN else np.nan
        e += 1
        if o == OP_SCORE:
            continue
        g = w[e - 1] * (y[e - 1] - sigmoid(zc))
        ws = ws_next
        for a in range(n):
            d = eta * g * xs[a] / ws
            v[a] += d
            u[a] -= a_sum * d
        b += eta * g
        if avg_on and t >= prm[P_AVG_START]:
            a_sum += ws
            sb += b
            navg += 1.0
        if scaling and not in_order:
            for c in range(k):
                sums[c] += rows[e - 1, c]
        t += 1.0
    for a in range(n):
        sl[jj[a], R_V] = v[a]
        sl[jj[a], R_U] = u[a]
    for c in range(k if scaling else 0):
        dt[int(sl[slots[c], R_AUX]), D_SUM] = sums[c]
    sc[S_T], sc[S_WS], sc[S_B], sc[S_A], sc[S_SB], sc[S_NAVG] = t, ws, b, a_sum, sb, navg
    return e


@njit(cache=True, error_model="numpy")
def _shared_rows(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, w, out, dx, xs, ada):  # type: ignore[no-untyped-def]
    """Events that share their slots, in order: quiet runs in `_quiet_run`, the others (warm-ups,
    centre updates, folds) one at a time in `_event`."""
    quiet = prm[P_QUIET_RUNS] != 0.0 and not ada
    k = slots.shape[0]
    e = 0
    while e < rows.shape[0]:
        if quiet:
            e = _quiet_run(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, w, out, e)
            if e >= rows.shape[0]:
                break
        out[e] = _event(prm, sc, sl, fl, dt, cl, wq, slots, rows[e], 0, k, op[e], y[e], w[e], dx, xs, ada)
        e += 1


@njit(cache=True, error_model="numpy", inline="always")
def _same_slots(idx, lo, at, k):  # type: ignore[no-untyped-def]
    for i in range(k):
        if idx[at + i] != idx[lo + i]:
            return False
    return True


@njit(cache=True, error_model="numpy", nogil=True)
def learn_block(prm, sc, sl, fl, cl, wq, dt, ptr, idx, val, op, y, w, out):  # type: ignore[no-untyped-def]
    """Run a block in order. `out[e]` gets the published logit of SCORE and TRAIN events (scored
    with the state before the event is learned: progressive validation) and NaN for LEARN ones.
    Consecutive events with the same slots in the same order (QUIET_MIN_EVENTS or more) run as the
    rows of a columnar block do."""
    dx, xs = _scratch(prm, ptr)
    ada = prm[P_SCHED] == SCH_ADAGRAD
    look = prm[P_QUIET_RUNS] != 0.0 and not ada
    n_ev = ptr.shape[0] - 1
    e = 0
    while e < n_ev:
        lo, hi = ptr[e], ptr[e + 1]
        k = hi - lo
        r = e + 1
        if look:
            while r < n_ev and ptr[r + 1] - ptr[r] == k and _same_slots(idx, lo, ptr[r], k):
                r += 1
        if r - e >= QUIET_MIN_EVENTS and k > 0:
            rows = val[lo : ptr[r]].reshape((r - e, k))
            _shared_rows(prm, sc, sl, fl, dt, cl, wq, idx[lo:hi], rows, op[e:r], y[e:r], w[e:r], out[e:r], dx, xs, ada)
            e = r
            continue
        if e + 2 < n_ev:
            _prefetch_slots(sl, fl, idx, ptr[e + 2], ptr[e + 3])
        if e + 1 < n_ev:
            _prefetch_details(sl, fl, dt, idx, ptr[e + 1], ptr[e + 2])
        out[e] = _event(prm, sc, sl, fl, dt, cl, wq, idx, val, lo, hi, op[e], y[e], w[e], dx, xs, ada)
        e += 1


@njit(cache=True, error_model="numpy", nogil=True)
def learn_rows(prm, sc, sl, fl, cl, wq, dt, slots, rows, op, y, out):  # type: ignore[no-untyped-def]
    """`learn_block` for events that share their slots, as a columnar block's rows do: row e has
    the values rows[e] (C order) at `slots`, weight 1. The same arithmetic, event for event, with
    no index array a row to build."""
    dx = np.zeros(max(1, int(prm[P_MAX_CENTRED])))
    xs = np.empty(int(prm[P_MAX_CENTRED]) + slots.shape[0] + 1)
    ada = prm[P_SCHED] == SCH_ADAGRAD
    _shared_rows(prm, sc, sl, fl, dt, cl, wq, slots, rows, op, y, np.ones(rows.shape[0]), out, dx, xs, ada)


@njit(cache=True, error_model="numpy")
def learn_event(prm, sc, sl, fl, cl, wq, dt, idx, val, op, y, w):  # type: ignore[no-untyped-def]
    """`learn_block` over a block of one event (features idx with values val): the same call of
    `_event`, so the same arithmetic bit for bit, without the block's five arrays to build. The
    daemon's path for a lone message (Engine.one)."""
    dx = np.zeros(max(1, int(prm[P_MAX_CENTRED])))
    xs = np.empty(int(prm[P_MAX_CENTRED]) + idx.shape[0] + 1)
    ada = prm[P_SCHED] == SCH_ADAGRAD
    return _event(prm, sc, sl, fl, dt, cl, wq, idx, val, 0, idx.shape[0], op, y, w, dx, xs, ada)
