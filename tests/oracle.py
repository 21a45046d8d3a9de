"""A plain, slow, readable implementation of the learner's update: the test oracle.

Dense dictionaries, the L2 step applied to every coefficient at every step, averages as a running
sum of every iterate. It follows PROTOCOL 5 and the coordinates described in oddsmill.kernel
(warm-up statistics with predictions preserved; frequent features centred at the end of their
warm-up window and then updated at every step) without any of the kernel's tricks (scale factor,
lazy catch-up, u + A v sums).
"""

from __future__ import annotations

import math
from typing import Any


def sigmoid(z: float) -> float:
    return 1 / (1 + math.exp(-z)) if z >= 0 else math.exp(z) / (1 + math.exp(z))


def oracle_for(s: Any) -> Oracle:
    """The oracle with the settings of a LearnerSettings, read by attribute (the oracle imports
    nothing of the learner's)."""
    return Oracle(
        s.schedule,
        s.eta0,
        s.l2,
        s.decay_a,
        s.power,
        s.adagrad_delta,
        s.average,
        s.average_start,
        s.scaling == "standardize",
        s.scale_warmup,
        s.max_centred,
    )


class Oracle:
    def __init__(
        self,
        schedule: str,
        eta0: float,
        l2: float,
        a: float = 0.0,
        c: float = 0.75,
        delta: float = 1.0,
        average: bool = False,
        average_start: int = 0,
        scaling: bool = False,
        warmup: int = 1000,
        max_centred: int = 64,
    ) -> None:
        self.schedule, self.eta0, self.l2, self.a, self.c, self.delta = (
            schedule,
            eta0,
            l2,
            a,
            c,
            delta,
        )
        self.average, self.average_start, self.scaling, self.warmup = (
            average,
            average_start,
            scaling,
            warmup,
        )
        self.max_centred = max_centred if scaling else 0
        self.theta: dict[str, float] = {}
        self.b = 0.0
        self.sum_theta: dict[str, float] = {}
        self.sum_b = 0.0
        self.n_avg = 0
        self.G: dict[str, float] = {}
        self.Gb = 0.0
        self.t = 0
        self.first: dict[str, int] = {}  # step of first learned appearance, in order
        self.mean: dict[str, float] = {}
        self.m2: dict[str, float] = {}
        self.count: dict[str, int] = {}
        self.scale: dict[str, float] = {}
        self.centre: dict[str, float] = {}  # the centred features, in the order they joined
        self.decided: set[str] = set()
        self.total: dict[str, float] = {}  # sum of a feature's learned values since its first

    def _rate(self, name: str | None) -> float:
        if self.schedule == "constant":
            return self.eta0
        if self.schedule == "inverse-time":
            return self.eta0 / (1 + self.l2 * self.eta0 * self.t)
        if self.schedule == "power":
            return self.eta0 * (1 + self.a * self.eta0 * self.t) ** (-self.c)
        g = self.Gb if name is None else self.G.get(name, 0.0)
        return self.eta0 / (self.delta + math.sqrt(g))

    def _xstd(self, k: str, v: float) -> float:
        return (v - self.centre.get(k, 0.0)) / self.scale.get(k, 1.0)

    def _params(self, averaged: bool) -> tuple[float, dict[str, float]]:
        if averaged and self.n_avg:
            return self.sum_b / self.n_avg, {k: s / self.n_avg for k, s in self.sum_theta.items()}
        return self.b, self.theta

    def _inputs(self, x: dict[str, float]) -> dict[str, float]:
        """Standardised inputs: present features, and centred ones (absent means value 0)."""
        out = {k: self._xstd(k, 0.0) for k in self.centre}
        out.update({k: self._xstd(k, v) for k, v in x.items()})
        return out

    def logit(self, x: dict[str, float], averaged: bool | None = None) -> float:
        b, theta = self._params(self.average if averaged is None else averaged)
        return b + sum(theta.get(k, 0.0) * v for k, v in self._inputs(x).items())

    def _reparam(self, k: str, new_centre: float, new_scale: float) -> None:
        old_c, old_s = self.centre.get(k, 0.0), self.scale.get(k, 1.0)
        shift = (new_centre - old_c) / old_s
        self.b += self.theta.get(k, 0.0) * shift
        self.sum_b += self.sum_theta.get(k, 0.0) * shift
        self.theta[k] = self.theta.get(k, 0.0) * new_scale / old_s
        self.sum_theta[k] = self.sum_theta.get(k, 0.0) * new_scale / old_s
        self.scale[k] = new_scale

    def learn(self, x: dict[str, float], y: float, w: float = 1.0) -> None:
        if self.scaling:
            for k, first in self.first.items():  # warm-up windows that end now
                if k in self.decided or first + self.warmup > self.t:
                    continue
                self.decided.add(k)
                if self.count[k] >= 0.01 * self.warmup and len(self.centre) < self.max_centred:
                    c = self.total[k] / (self.t - self.first[k])  # the window's mean
                    self._reparam(k, c, self.scale[k])
                    self.centre[k] = c
            for k in self.centre if self.t % 1024 == 0 else ():  # centres follow the running mean
                c = self.total[k] / (self.t - self.first[k])
                self._reparam(k, c, self.scale[k])
                self.centre[k] = c
            for k, v in x.items():
                self.first.setdefault(k, self.t)
                self.total[k] = self.total.get(k, 0.0) + v
                if k in self.centre or self.count.get(k, 0) >= self.warmup:
                    continue
                n = self.count.get(k, 0) + 1
                d = v - self.mean.get(k, 0.0)
                mean = self.mean.get(k, 0.0) + d / n
                m2 = self.m2.get(k, 0.0) + d * (v - mean)
                if m2 / n <= (1e-9 * mean) ** 2:  # constant so far
                    scale = abs(mean) if mean != 0 else 1.0
                else:
                    scale = math.sqrt(m2 / n + mean * mean / n)
                self._reparam(k, 0.0, scale)
                self.mean[k], self.m2[k], self.count[k] = mean, m2, n
        inputs = self._inputs(x)
        g = w * (y - sigmoid(self.logit(x, averaged=False)))
        for k in set(self.theta) | set(inputs):
            gk = g * inputs.get(k, 0.0)
            if self.schedule == "adagrad":
                if k in inputs:
                    self.G[k] = self.G.get(k, 0.0) + gk * gk
                eta = self._rate(k)
            else:
                eta = self._rate(None)
            self.theta[k] = self.theta.get(k, 0.0) + eta * (gk - self.l2 * self.theta.get(k, 0.0))
        if self.schedule == "adagrad":
            self.Gb += g * g
        self.b += self._rate(None) * g
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
        return b - sum(coefs[k] * c for k, c in self.centre.items()), coefs
