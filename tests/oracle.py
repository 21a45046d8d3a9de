"""A plain, slow, readable implementation of the learner's update: the test oracle.

Dense dictionaries, the L2 step applied to every coefficient at every step, averages as a running
sum of every iterate. It follows PROTOCOL 5 and the coordinates described in oddsmill.kernel
(warm-up statistics with predictions preserved; centring while a feature has been present in every
learned event) without any of the kernel's tricks (scale factor, lazy catch-up, u + A v sums).
"""

from __future__ import annotations

import math


def sigmoid(z: float) -> float:
    return 1 / (1 + math.exp(-z)) if z >= 0 else math.exp(z) / (1 + math.exp(z))


class Oracle:
    def __init__(self, schedule: str, eta0: float, l2: float, a: float = 0.0, c: float = 0.75,
                 delta: float = 1.0, average: bool = False, average_start: int = 0,
                 scaling: bool = False, warmup: int = 1000) -> None:
        self.schedule, self.eta0, self.l2, self.a, self.c, self.delta = schedule, eta0, l2, a, c, delta
        self.average, self.average_start, self.scaling, self.warmup = average, average_start, scaling, warmup
        self.theta: dict[str, float] = {}
        self.b = 0.0
        self.sum_theta: dict[str, float] = {}
        self.sum_b = 0.0
        self.n_avg = 0
        self.G: dict[str, float] = {}
        self.Gb = 0.0
        self.t = 0
        self.numeric: set[str] = set()
        self.mean: dict[str, float] = {}
        self.m2: dict[str, float] = {}
        self.count: dict[str, int] = {}
        self.scale: dict[str, float] = {}
        self.centred: set[str] | None = None

    def _rate(self, name: str | None) -> float:
        if self.schedule == "constant":
            return self.eta0
        if self.schedule == "inverse-time":
            return self.eta0 / (1 + self.l2 * self.eta0 * self.t)
        if self.schedule == "power":
            return self.eta0 * (1 + self.a * self.eta0 * self.t) ** (-self.c)
        g = self.Gb if name is None else self.G.get(name, 0.0)
        return self.eta0 / (self.delta + math.sqrt(g))

    def _centre(self, k: str) -> float:
        return self.mean.get(k, 0.0) if self.centred and k in self.centred else 0.0

    def _xstd(self, k: str, v: float) -> float:
        return (v - self._centre(k)) / self.scale.get(k, 1.0)

    def _params(self, averaged: bool) -> tuple[float, dict[str, float]]:
        if averaged and self.n_avg:
            return self.sum_b / self.n_avg, {k: s / self.n_avg for k, s in self.sum_theta.items()}
        return self.b, self.theta

    def logit(self, x: dict[str, float], averaged: bool | None = None) -> float:
        """The model: b + sum over present features of theta x_std, minus the centring share of
        centred features that are absent."""
        b, theta = self._params(self.average if averaged is None else averaged)
        z = b
        for k, v in x.items():
            z += theta.get(k, 0.0) * self._xstd(k, v)
        for k in self.centred or ():
            if k not in x:
                z -= theta.get(k, 0.0) * self.mean[k] / self.scale[k]
        return z

    def _reparam(self, k: str, new_centre: float, new_scale: float) -> None:
        old_c, old_s = self._centre(k), self.scale.get(k, 1.0)
        shift = (new_centre - old_c) / old_s
        self.b += self.theta.get(k, 0.0) * shift
        self.sum_b += self.sum_theta.get(k, 0.0) * shift
        self.theta[k] = self.theta.get(k, 0.0) * new_scale / old_s
        self.sum_theta[k] = self.sum_theta.get(k, 0.0) * new_scale / old_s
        self.scale[k] = new_scale

    def learn(self, x: dict[str, float], numeric: set[str], y: float, w: float = 1.0) -> None:
        self.numeric |= numeric & set(x)
        if self.centred is None:
            self.centred = {k for k in x if k in self.numeric} if self.scaling else set()
            for k in self.centred:
                self.mean[k] = 0.0
        for k in sorted(self.centred - set(x)):
            self._reparam(k, 0.0, self.scale[k])
            self.centred.discard(k)
        if self.scaling:
            for k, v in x.items():
                if k not in self.numeric or self.count.get(k, 0) >= self.warmup:
                    continue
                n = self.count.get(k, 0) + 1
                d = v - self.mean.get(k, 0.0)
                mean = self.mean.get(k, 0.0) + d / n
                m2 = self.m2.get(k, 0.0) + d * (v - mean)
                sd = math.sqrt(m2 / n)
                scale = sd if sd > 1e-9 * abs(mean) else (abs(mean) if mean != 0 else 1.0)
                self._reparam(k, mean if k in self.centred else 0.0, scale)
                self.mean[k], self.m2[k], self.count[k] = mean, m2, n
        g = w * (y - sigmoid(self.logit(x, averaged=False)))
        names = set(self.theta) | set(x)
        if self.schedule == "adagrad":
            for k in names:
                gk = g * self._xstd(k, x[k]) if k in x else 0.0
                if k in x:
                    self.G[k] = self.G.get(k, 0.0) + gk * gk
                eta = self._rate(k)
                self.theta[k] = self.theta.get(k, 0.0) + eta * (gk - self.l2 * self.theta.get(k, 0.0))
            self.Gb += g * g
            self.b += self._rate(None) * g
        else:
            eta = self._rate(None)
            for k in names:
                gk = g * self._xstd(k, x[k]) if k in x else 0.0
                self.theta[k] = self.theta.get(k, 0.0) + eta * (gk - self.l2 * self.theta.get(k, 0.0))
            self.b += eta * g
        if self.average and self.t >= self.average_start:
            for k, v in self.theta.items():
                self.sum_theta[k] = self.sum_theta.get(k, 0.0) + v
            self.sum_b += self.b
            self.n_avg += 1
        self.t += 1

    def coefficients(self) -> tuple[float, dict[str, float]]:
        """Raw units: coef = theta / scale, intercept = b - sum of coef x centre."""
        b, theta = self._params(self.average)
        coefs = {k: v / self.scale.get(k, 1.0) for k, v in theta.items()}
        return b - sum(coefs[k] * self._centre(k) for k in coefs), coefs
