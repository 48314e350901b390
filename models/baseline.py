"""Adaptive baseline: exponentially weighted mean and variance per feature.

The baseline follows slow drift (a service whose latency creeps up over a week is not an incident)
while a sudden departure from the recent level stands out as a large standardised deviation.

Per feature, with smoothing factor ``alpha`` and ``keep = 1 - alpha``, every update decays the
weights of all earlier values by ``keep`` and gives the new value the weight ``new``; the
statistics are the weighted mean and the *biased* weighted variance, updated incrementally
(West's weighted form of Welford's algorithm)::

    W     = keep * W + new                  # sum of weights
    W2    = keep**2 * W2 + new**2           # sum of squared weights
    diff  = x - mean
    mean  = mean + new * diff / W
    var   = (keep * var * W_before + new * diff * (x - mean)) / W

starting from ``mean = x0, var = 0, W = W2 = 1`` at a feature's first value.

* ``adjust=True`` (default, ``new = 1``): the weights are ``keep ** age`` normalised by their sum,
  so ``mean`` equals ``pandas.Series.ewm(alpha=alpha, adjust=True).mean()`` and starts out as a
  plain average of the first values.
* ``adjust=False`` (``new = alpha``, so ``W`` stays 1): the classic recursion
  ``mean = mean + alpha * (x - mean)``, equal to ``.ewm(alpha=alpha, adjust=False).mean()``. Its
  first value keeps the weight ``keep ** n`` -- still one half after one half-life -- so a
  young baseline is mostly its first window, and early z-scores are far too large.

``var`` equals ``.var(bias=True)`` with the same arguments. z-scores use the de-biased variance
``var / (1 - W2 / W**2)``, which equals ``.var(bias=False)`` (for two values: the sample
variance); without it a young baseline would have far too small a spread.

The raw score of a window is the largest absolute *predictive* deviation among its features:
each z-score is widened for the uncertainty of the mean and converted to the normal scale with
Student's t at the baseline's effective degrees of freedom (see :meth:`AdaptiveBaseline.compare`).
A mature baseline's raw score is close to its largest ``|z|``; a baseline of six windows gives
even a huge ``z`` a modest raw score. Without that, the chance extremes of a service's first few
windows would sit at the top of its calibration history for ``calibration_history`` windows and
mask real incidents.

Examples
--------
>>> from models.baseline import AdaptiveBaseline
>>> baseline = AdaptiveBaseline(half_life=24.0)
>>> for latency in [200.0, 204.0, 198.0, 202.0, 199.0, 201.0]:
...     baseline.learn_one({"latency_ms": latency})
>>> expected, z = baseline.deviation("latency_ms", 260.0)
>>> round(expected, 2), round(z, 1)
(200.65, 27.8)
>>> round(baseline.score_one({"latency_ms": 260.0}), 2), round(baseline.score_one({"latency_ms": 201.0}), 2)
(4.71, 0.14)
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from models.base import split_features
from models.errors import CorruptState, SettingsError

__all__ = ["AdaptiveBaseline", "EwmaChart", "alpha_from_half_life", "ewma_chart", "normal_equivalent"]

# |z| is clipped here so one absurd value cannot turn a score or a contribution into inf/NaN.
Z_LIMIT = 1e6
_TINY = 1e-300


def alpha_from_half_life(half_life: float) -> float:
    """EWMA smoothing factor whose weights halve every ``half_life`` updates.

    >>> alpha_from_half_life(1.0)
    0.5
    >>> round(alpha_from_half_life(24.0), 5)
    0.02847
    """
    if not (isinstance(half_life, (int, float)) and math.isfinite(half_life) and half_life > 0):
        raise SettingsError(f"half_life must be a finite number > 0, got {half_life!r}")
    return 1.0 - 0.5 ** (1.0 / float(half_life))


def normal_equivalent(t: float, dof: float) -> float:
    """Normal deviate with (about) the same tail probability as ``t`` under Student's t.

    Uses the closed form ``sign(t) * (8 dof + 1) / (8 dof + 3) * sqrt(dof * log1p(t**2 / dof))``
    (a classical normal approximation to Student's t, after D. L. Wallace, 1959). It is monotone
    in ``|t|``, tends to ``t`` as ``dof`` grows and is 0 for ``dof <= 0``. A z-score measured against
    a baseline of a few windows is t-distributed with heavy tails; converting it keeps a young
    baseline's chance deviations from looking like incidents.

    >>> round(normal_equivalent(3.0, 1e9), 3)
    3.0
    >>> round(normal_equivalent(10.0, 2.0), 2)
    2.51
    """
    if dof <= 0.0:
        return 0.0
    z = (8.0 * dof + 1.0) / (8.0 * dof + 3.0) * math.sqrt(dof * math.log1p(t * t / dof))
    return z if t >= 0.0 else -z


class AdaptiveBaseline:
    """Exponentially weighted mean and variance per feature, scored by the largest ``|z|``.

    Parameters
    ----------
    half_life
        Half-life of the weights, in updates (windows).
    adjust
        Normalised weights (``True``, pandas ``adjust=True``) or the classic recursion
        (``False``); see the module docstring.
    absolute_floor, relative_floor
        The standard deviation used in z-scores is at least
        ``absolute_floor + relative_floor * |mean|``. A metric that has been perfectly flat has zero
        variance; the floor keeps its z-score finite (a change of 0.1 % of its level counts as
        one standard deviation with the default ``relative_floor``).

    Notes
    -----
    A feature's z-score is 0 until it has been seen twice (no spread is known yet). Features are
    added when first seen; features absent from a window are left untouched. Feature order in the
    input never matters. The statistics live in plain Python lists: a window has a handful of
    features, where per-call numpy overhead would cost more than the arithmetic (the saved state
    uses numpy arrays).

    Examples
    --------
    >>> baseline = AdaptiveBaseline(half_life=2.0, adjust=False)
    >>> for x in [1.0, 2.0, 3.0]:
    ...     baseline.learn_one({"a": x})
    >>> mean, z = baseline.deviation("a", 3.0)
    >>> round(mean, 4), round(z, 4)
    (1.7929, 1.0987)
    """

    __slots__ = ("half_life", "alpha", "adjust", "absolute_floor", "relative_floor",
                 "_names", "_index", "_mean", "_var", "_w", "_w2", "_count")

    def __init__(self, half_life: float = 24.0, *, adjust: bool = True,
                 absolute_floor: float = 1e-9, relative_floor: float = 1e-3) -> None:
        self.alpha = alpha_from_half_life(half_life)
        self.half_life = float(half_life)
        if not isinstance(adjust, bool):
            raise SettingsError(f"adjust must be a bool, got {adjust!r}")
        self.adjust = adjust
        if not (math.isfinite(absolute_floor) and absolute_floor > 0):
            raise SettingsError(f"absolute_floor must be > 0, got {absolute_floor!r}")
        if not (math.isfinite(relative_floor) and relative_floor >= 0):
            raise SettingsError(f"relative_floor must be >= 0, got {relative_floor!r}")
        self.absolute_floor = float(absolute_floor)
        self.relative_floor = float(relative_floor)
        self._names: list[str] = []
        self._index: dict[str, int] = {}
        self._mean: list[float] = []
        self._var: list[float] = []  # biased (pandas ``bias=True``)
        self._w: list[float] = []    # sum of weights
        self._w2: list[float] = []   # sum of squared weights, for de-biasing
        self._count: list[int] = []

    @property
    def features(self) -> tuple[str, ...]:
        """Feature names known so far, in the order they were first seen."""
        return tuple(self._names)

    def locate(self, names: Iterable[str], *, add: bool = False) -> list[int]:
        """Positions of ``names`` in the statistics; -1 for unknown ones unless ``add``.

        A feature added here has no observation yet: it is not scorable until learned twice.
        """
        index = self._index
        out = []
        for name in names:
            i = index.get(name, -1)
            if i < 0 and add:
                i = index[name] = len(self._names)
                self._names.append(name)
                self._mean.append(0.0)
                self._var.append(0.0)
                self._w.append(1.0)
                self._w2.append(1.0)
                self._count.append(0)
            out.append(i)
        return out

    def statistics(self, feature: str) -> tuple[float, float, float, int]:
        """``(mean, biased variance, de-biased variance, count)`` of one feature.

        The de-biased variance is NaN below two observations.
        """
        i = self._index[feature]
        w, w2 = self._w[i], self._w2[i]
        denom = 1.0 - w2 / (w * w)
        unbiased = self._var[i] / denom if self._count[i] >= 2 and denom > 0.0 else math.nan
        return self._mean[i], self._var[i], unbiased, self._count[i]

    def compare(self, idx: Sequence[int], values: Sequence[float]
                ) -> tuple[list[float], list[float], list[float], list[bool]]:
        """Compare ``values`` with the baseline at valid positions ``idx``.

        Returns
        -------
        expected
            Baseline means (NaN for a feature never learned).
        z
            Signed z-scores ``(x - mean) / sd``, clipped to ``±Z_LIMIT``; 0.0 where not scorable.
        tail
            Signed *predictive* deviations on the normal scale: ``x - mean`` over its predictive
            spread ``sd * sqrt(1 + W2 / W**2)`` (the mean is itself estimated), converted with
            :func:`normal_equivalent` at ``W**2 / W2 - 1`` effective degrees of freedom. For a
            mature baseline this is close to ``z``; for a young one it is much smaller.
        scorable
            Whether each feature has been learned at least twice (a spread is known).
        """
        expected, zs, tails, scorable = [], [], [], []
        mean_, var_, w_, w2_, count_ = self._mean, self._var, self._w, self._w2, self._count
        floor_abs, floor_rel = self.absolute_floor, self.relative_floor
        for i, x in zip(idx, values):
            n, mean = count_[i], mean_[i]
            expected.append(mean if n else math.nan)
            if n < 2:
                zs.append(0.0)
                tails.append(0.0)
                scorable.append(False)
                continue
            # De-biased variance; 1 - W2/W**2 is 0 only when alpha rounds to 1 (a baseline that
            # is just the last value): the variance is then 0 and the floor applies.
            w = w_[i]
            share = w2_[i] / (w * w)  # 1 / effective sample size
            denom = 1.0 - share
            var = var_[i] / denom if denom > 0.0 else 0.0
            sd = max(math.sqrt(var), floor_abs + floor_rel * abs(mean))
            z = (x - mean) / sd
            z = Z_LIMIT if z > Z_LIMIT else -Z_LIMIT if z < -Z_LIMIT else z
            zs.append(z)
            tails.append(normal_equivalent(z / math.sqrt(1.0 + share), 1.0 / share - 1.0))
            scorable.append(True)
        return expected, zs, tails, scorable

    def update(self, idx: Sequence[int], values: Sequence[float]) -> None:
        """Learn ``values`` at valid, distinct positions ``idx`` (from ``locate(add=True)``)."""
        a = self.alpha
        keep = 1.0 - a
        keep2 = keep * keep
        mean_, var_, w_, w2_, count_ = self._mean, self._var, self._w, self._w2, self._count
        for i, x in zip(idx, values):
            if count_[i] == 0:
                mean_[i], var_[i], w_[i], w2_[i] = x, 0.0, 1.0, 1.0
            elif self.adjust:
                w_before = keep * w_[i]
                w = w_before + 1.0
                diff = x - mean_[i]
                mean = mean_[i] + diff / w
                var_[i] = (w_before * var_[i] + diff * (x - mean)) / w
                mean_[i], w_[i] = mean, w
                w2_[i] = keep2 * w2_[i] + 1.0
            else:
                # W stays exactly 1: the general form reduces to the classic recursion.
                diff = x - mean_[i]
                incr = a * diff
                mean_[i] += incr
                var_[i] = keep * (var_[i] + diff * incr)
                w2_[i] = keep2 * w2_[i] + a * a
            count_[i] += 1

    # ------------------------------------------------------------------ Scorer protocol
    def learn_one(self, x: Mapping[str, float]) -> None:
        """Update the baseline with one window's features (non-finite values are skipped)."""
        names, values = split_features(x)
        self.update(self.locate(names, add=True), values)

    def score_one(self, x: Mapping[str, float]) -> float:
        """Largest predictive ``|z|`` (``tail`` of :meth:`compare`) among the known features of
        ``x``; 0.0 when none is scorable."""
        names, values = split_features(x)
        pairs = [(i, v) for i, v in zip(self.locate(names), values) if i >= 0]
        _, _, tail, _ = self.compare([i for i, _ in pairs], [v for _, v in pairs])
        return max(map(abs, tail), default=0.0)

    def deviation(self, feature: str, value: float) -> tuple[float, float]:
        """``(expected, z)`` of one value of ``feature`` (``(nan, 0.0)`` if never learned)."""
        (i,) = self.locate([feature])
        if i < 0:
            return math.nan, 0.0
        expected, z, _, _ = self.compare([i], [float(value)])
        return expected[0], z[0]

    # ------------------------------------------------------------------ state
    _ARRAYS = (("mean", np.float64), ("var", np.float64), ("w", np.float64),
               ("w2", np.float64), ("count", np.int64))

    def to_state(self) -> dict[str, Any]:
        """Plain-dict state (numpy arrays for the per-feature statistics)."""
        state: dict[str, Any] = {
            "half_life": self.half_life,
            "adjust": self.adjust,
            "absolute_floor": self.absolute_floor,
            "relative_floor": self.relative_floor,
            "names": list(self._names),
        }
        for key, dtype in self._ARRAYS:
            state[key] = np.array(getattr(self, f"_{key}"), dtype=dtype)
        return state

    @classmethod
    def from_state(cls, state: Mapping[str, Any]) -> AdaptiveBaseline:
        """Rebuild a baseline from :meth:`to_state` output; malformed states raise ``CorruptState``."""
        try:
            model = cls(state["half_life"], adjust=state["adjust"],
                        absolute_floor=state["absolute_floor"],
                        relative_floor=state["relative_floor"])
            names = list(state["names"])
            if not all(isinstance(n, str) for n in names) or len(set(names)) != len(names):
                raise CorruptState("baseline feature names must be distinct strings")
            n = len(names)
            lists = {}
            for key, dtype in cls._ARRAYS:
                arr = state[key]
                if not isinstance(arr, np.ndarray) or arr.shape != (n,) or arr.dtype != dtype:
                    raise CorruptState(f"baseline {key!r} must be a {np.dtype(dtype)} array of {n}")
                lists[key] = arr.tolist()  # exact: float64 -> Python float
        except (KeyError, TypeError, ValueError, SettingsError) as exc:
            raise CorruptState(f"malformed baseline state: {exc}") from exc
        if any(c < 0 for c in lists["count"]) or not all(
                math.isfinite(v) for key in ("mean", "var", "w", "w2") for v in lists[key]) or any(
                w <= 0 for w in lists["w"]):
            raise CorruptState("baseline statistics must be finite, weights > 0, counts >= 0")
        model._names = names
        model._index = {name: i for i, name in enumerate(names)}
        for key, _ in cls._ARRAYS:
            setattr(model, f"_{key}", lists[key])
        return model


@dataclass(slots=True)
class EwmaChart:
    """Result of :func:`ewma_chart`."""

    statistic: np.ndarray       #: EWMA statistic after each observation
    center: float               #: target (centre line)
    lower: float                #: lower control limit
    upper: float                #: upper control limit
    out_of_control: np.ndarray  #: boolean mask, statistic outside [lower, upper]


def ewma_chart(values: Sequence[float] | np.ndarray, lam: float, target: float, sigma: float,
               k: float = 3.0) -> EwmaChart:
    """EWMA control chart with asymptotic limits.

    ``EWMA_0 = target``, ``EWMA_t = lam * y_t + (1 - lam) * EWMA_{t-1}``, limits
    ``target ± k * sigma * sqrt(lam / (2 - lam))`` (the steady-state form given in the
    NIST/SEMATECH e-Handbook of Statistical Methods, section 6.3.2.4).

    Parameters
    ----------
    values
        Observations in time order.
    lam
        Weight of the newest observation, in (0, 1].
    target
        Process mean the chart is centred on.
    sigma
        Process standard deviation.
    k
        Width of the limits in asymptotic standard deviations of the statistic.

    Examples
    --------
    >>> chart = ewma_chart([50.0, 51.0, 58.0], lam=0.5, target=50.0, sigma=1.0, k=3.0)
    >>> chart.statistic.tolist()
    [50.0, 50.5, 54.25]
    >>> round(chart.upper, 4), chart.out_of_control.tolist()
    (51.7321, [False, False, True])
    """
    if not (0.0 < lam <= 1.0):
        raise SettingsError(f"lam must be in (0, 1], got {lam}")
    if not (math.isfinite(sigma) and sigma >= 0.0):
        raise SettingsError(f"sigma must be a finite number >= 0, got {sigma}")
    y = np.asarray(values, dtype=np.float64)
    stat = np.empty_like(y)
    level = float(target)
    # A plain loop: the recursion is sequential and charts are short.
    for t, v in enumerate(y):
        level = lam * v + (1.0 - lam) * level
        stat[t] = level
    half_width = k * sigma * math.sqrt(lam / (2.0 - lam))
    lower, upper = target - half_width, target + half_width
    return EwmaChart(stat, float(target), lower, upper, (stat < lower) | (stat > upper))
