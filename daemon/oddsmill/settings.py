"""The learner's settings: immutable, validated once, at construction.

Defaults were chosen from measurements (DEVELOPERS.md, "Choosing the defaults"): the power schedule
with c = 0.75 and a = 0.03 in standardised units, eta0 = 0.5, Polyak-Ruppert averaging, L2 = 1e-4,
and numeric features standardised over their first 1,000 learned values.

>>> LearnerSettings().schedule
'power'
>>> LearnerSettings(l2=-1)
Traceback (most recent call last):
...
oddsmill.errors.ConfigError: l2 must be >= 0, got -1
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

from .errors import ConfigError

SCHEDULES = ("constant", "inverse-time", "power", "adagrad")
SCALINGS = ("standardize", "none")


@dataclass(frozen=True)
class LearnerSettings:
    """Everything that determines the learner's arithmetic.

    - `schedule`, `eta0`: the learning-rate schedule (PROTOCOL 5) and its initial rate.
    - `l2`: lambda, the L2 penalty on the coefficients in standardised units; the intercept is free.
    - `decay` (a) and `power` (c): the power schedule's eta0 (1 + a eta0 t)^(-c); `decay=None`
      means a = l2 as in PROTOCOL 5. Our default is a = 0.03, because the default l2 is far below the
      smallest eigenvalue of the Hessian, which is where Xu (2011) puts a.
    - `adagrad_delta`: AdaGrad's delta in eta0 / (delta + sqrt(sum of squared gradients)).
    - `average`, `average_start`: Polyak-Ruppert averaging of the iterates from that step on.
    - `scaling`: "standardize" divides each numeric feature by its standard deviation over its first
      `scale_warmup` learned values (then frozen) and lets the optimiser centre frequent features;
      "none" learns on the raw values exactly as PROTOCOL 5 writes the update.
    - `max_features`: the vocabulary cap; names first seen after it is full are ignored and counted.
    - `max_centred`: how many frequent features the optimiser may centre (each costs a little on
      every step; see oddsmill.kernel).
    """

    schedule: str = "power"
    eta0: float = 0.5
    l2: float = 1e-4
    decay: float | None = 0.03
    power: float = 0.75
    adagrad_delta: float = 1.0
    average: bool = True
    average_start: int = 0
    scaling: str = "standardize"
    scale_warmup: int = 1000
    max_features: int = 1_000_000
    max_centred: int = 64

    def __post_init__(self) -> None:
        if self.schedule not in SCHEDULES:
            raise ConfigError(f"schedule must be one of {', '.join(SCHEDULES)}, got {self.schedule!r}")
        if self.scaling not in SCALINGS:
            raise ConfigError(f"scaling must be one of {', '.join(SCALINGS)}, got {self.scaling!r}")
        _positive("eta0", self.eta0)
        _at_least("l2", self.l2, 0.0)
        if self.decay is not None:
            _at_least("decay", self.decay, 0.0)
        _positive("power", self.power)
        if self.power > 1.0:
            raise ConfigError(f"power must be in (0, 1], got {self.power!r}")
        _positive("adagrad_delta", self.adagrad_delta)
        for name in ("average_start", "scale_warmup", "max_features", "max_centred"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int):
                raise ConfigError(f"{name} must be an integer, got {value!r}")
        _at_least("average_start", self.average_start, 0)
        _at_least("scale_warmup", self.scale_warmup, 1)
        _at_least("max_features", self.max_features, 1)
        _at_least("max_centred", self.max_centred, 0)
        if not isinstance(self.average, bool):
            raise ConfigError(f"average must be true or false, got {self.average!r}")
        # The L2 step multiplies the coefficients by (1 - eta lambda); at or past 1 it flips their sign.
        top_rate = self.eta0 / self.adagrad_delta if self.schedule == "adagrad" else self.eta0
        if top_rate * self.l2 >= 1.0:
            raise ConfigError(
                f"the largest rate times l2 must be < 1 for the L2 step to shrink, got "
                f"{top_rate:g} x {self.l2:g} = {top_rate * self.l2:g}; lower eta0 or l2"
            )

    @property
    def decay_a(self) -> float:
        """The power schedule's a: `decay`, or lambda when unset (PROTOCOL 5)."""
        return self.l2 if self.decay is None else self.decay

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> LearnerSettings:
        known = {f.name for f in dataclasses.fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ConfigError(f"unknown learner setting {unknown[0]!r}; known: {', '.join(sorted(known))}")
        return cls(**data)


def _positive(name: str, value: Any) -> None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ConfigError(f"{name} must be a finite number, got {value!r}")
    if value <= 0:
        raise ConfigError(f"{name} must be > 0, got {value!r}")


def _at_least(name: str, value: Any, low: float) -> None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ConfigError(f"{name} must be a finite number, got {value!r}")
    if value < low:
        raise ConfigError(f"{name} must be >= {low:g}, got {value!r}")
