"""Seasonal baseline: what each feature should be at this hour, and how far it is from that.

Per feature the baseline keeps three predictions of the next window's value and picks, for every
window, the one that has recently been the most accurate:

0. *level*: an exponentially weighted mean of the feature (half-life ``half_life`` windows);
1. *hour of day*: the mean of the feature at this hour of the day (24 slots), plus an
   exponentially weighted offset that follows slow drift of the whole profile; read either as
   steps (the slot's mean all hour) or as a line between the middles of neighbouring slots
   (:func:`blend_of`), whichever has been the more accurate for this feature (a smooth daily
   curve is better drawn as a line, a service that switches at fixed hours as steps);
2. *hour of week*: the same with 168 slots (hour and weekday, Monday first), read in the shape
   chosen for the day profile.

Each prediction's accuracy is an EWMA of its absolute error (half-life ``8 * half_life``): the
robust scale of a feature is ``1.2533 *`` the chosen prediction's mean absolute error (for a
normal error, ``sigma = sqrt(pi / 2) * E|e|``; common practice), so it follows a range that
drifts and a single outlier moves it far less than it would move a variance. A seasonal
prediction is only a candidate once two full cycles have been seen (a pattern seen once may be a
coincidence) and is chosen only when its error is at least 10 % below the simpler one's; a
service without daily or weekly cycles therefore falls back to the level, and a service with
them gets their benefit once they have shown up twice. Without window start times (``at=None``)
only the level is used.

Per window and feature the baseline reports three kinds of evidence, all on a standard-normal
scale so they can be compared and squashed alike:

* ``z`` -- deviation from the chosen prediction over the robust scale; converted with
  :func:`~models.baseline.normal_equivalent` at the error EWMA's effective sample size, so a
  young feature's chance deviations are not taken for incidents;
* ``change`` -- the first difference from the previous window over its own robust scale;
* ``stuck`` -- a value repeated exactly ``r`` windows in a row by a feature that rarely repeats:
  with repeat rate ``q`` (an EWMA of "same as the previous window", with half a repeat of prior
  evidence) and the rate ``q2`` at which past runs went on (learnt when a run ends), the chance of
  the run is ``q * q2 ** (r - 1)``, reported as the normal deviate of that tail probability (0
  when nothing repeats). Both rates are those learnt before the run began: the run's own
  repeats join the repeat rate only when it ends, so a frozen exporter does not make its own
  run look routine while it is being judged. A feature that often repeats (a counter that sits
  at 0, counting the run in progress) gives none. When the caller knows that the window saw the
  metric several times (``steady``, see :func:`repeats`), a repeat must also have held one value
  throughout, and for a metric that rarely does so the first such window starts a run: a frozen
  exporter's first whole window counts;
* ``drift`` -- an EWMA of the clipped ``z`` over its own learned scale: a deviation too small to
  alert in any one window that persists (a slow leak, a level that creeps) grows it.

Each feature's tail probability ``Evidence.p`` is the smallest of: the learned tail of ``|z|``,
twice the learned tail of ``|drift|`` (two looks at the same deviation), and the stuck run's
chance (directly for a continuous feature, through the ``|z|`` tail for one that sometimes
repeats). The tails learn from ``|z|`` and ``|drift|`` only, so a stuck run in progress never
teaches its feature that stuck runs are routine. For a feature that holds one value in nearly
every window (:data:`HOLD_RATE`, a restart counter at 0) ``Evidence.p`` is at least its rate of
change: its scale is made of a handful of changes, so ``z`` cannot say how rare a change is.

Scales have a floor of ``absolute_floor + relative_floor * |prediction|``; the message count
(feature ``"count"``) also has the Poisson floor ``sqrt(prediction)``, because counts of events
are at least that noisy (common practice) and a count that is nearly constant would otherwise
turn one missing scrape into a huge deviation.

Examples
--------
>>> from models.seasonal import SeasonalBaseline
>>> base = SeasonalBaseline(half_life=24.0)
>>> for i in range(200):
...     base.learn_one({"latency_ms": 200.0 + (i % 7) - 3.0}, at=1772409600.0 + 300.0 * i)
>>> ev = base.evidence_one({"latency_ms": 260.0}, at=1772409600.0 + 300.0 * 200)
>>> round(ev["latency_ms"].expected, 1), round(ev["latency_ms"].z, 1)
(199.9, 17.3)
>>> round(base.score_one({"latency_ms": 201.0}, at=1772409600.0 + 300.0 * 200), 2)
0.48
"""

from __future__ import annotations

import itertools
import math
from array import array
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from statistics import NormalDist
from typing import Any

import numpy as np

from models.base import PURE_PYTHON, split_features
from models.baseline import Z_LIMIT, alpha_from_half_life
from models.errors import CorruptState, SettingsError

__all__ = ["Evidence", "SeasonalBaseline", "blend_of", "repeats", "slots_of", "tail_deviate"]

DAY_S = 86400.0
WEEK_S = 7 * DAY_S
_HOUR_S = 3600.0
# 1970-01-01 was a Thursday; shifting by three days makes Monday 00:00 the first hour of the week.
_MONDAY_SHIFT_S = 3 * DAY_S
#: Cycles a seasonal profile must have seen before its prediction is a candidate.
MIN_CYCLES = 2.0
#: A more complex prediction must beat the simpler one's error by this factor to be chosen.
PREFER_SIMPLER = 0.9
#: sqrt(pi / 2): standard deviation of a normal error over its mean absolute value.
MAD_TO_SD = math.sqrt(math.pi / 2.0)
#: Half-life of the seasonal slot means, in cycles (days for the day profile, weeks for the week
#: profile): recent cycles count most, but one odd day does not replace the profile.
SLOT_HALF_LIFE_CYCLES = 3.0
#: The scales (prediction error, first difference) forget this many times more slowly than the
#: level (8 * 24 windows: 16 hours of five-minute windows), so the ramp-up of an incident or a
#: busy hour does not become "normal spread" at once. On the NAB development slice 8 gave a
#: better emitted-flag score than 4 or 16 (36.5 against 30.3 and 31.8, seed 0) at the same swept
#: score.
SCALE_FACTOR = 8.0
#: The repeat rate forgets more slowly still (about 1.3 days of five-minute windows).
REPEAT_FACTOR = 16.0
#: Only a feature that repeats its value in fewer than this share of windows can be "stuck": for
#: one that often repeats (a counter that sits at 0), a long run is its normal behaviour.
STUCK_MAX_RATE = 0.2
_NORMAL = NormalDist()
#: Per-feature tail: strengths above TAIL_LEVEL are "events"; a feature's chance of a strength
#: ``s`` is ``max(P(|N(0,1)| > s), rate * exp(-(s - TAIL_LEVEL) / beta))`` with the event rate and
#: mean excess learned per feature (an exponential tail over a fixed level). A feature whose
#: deviations are routinely huge (a restart counter that is 0 but for deploys) learns a wide
#: tail and stops alerting on every deploy; a quiet feature keeps a near-normal tail. The prior
#: rate is the normal tail's own (0.27 % of windows beyond 3) worth TAIL_PRIOR_WINDOWS windows
#: (a day of five-minute windows); the prior mean excess is 0.5, worth TAIL_PRIOR_EVENTS events:
#: somewhat heavier than the normal's 0.28, because operational metrics are heavier-tailed than
#: normal (common practice). On the demo scenario and NAB (BENCHMARKS.md) 0.5 / 4 events gave
#: fewer false onsets than the normal's own 0.33 / 2 at about the same NAB score.
TAIL_LEVEL = 3.0
GAUSS_RATE = math.erfc(3.0 / math.sqrt(2.0))  # 0.0027
GAUSS_EXCESS = 0.5
TAIL_PRIOR_WINDOWS = 288.0
TAIL_PRIOR_EVENTS = 4.0
#: The tail statistics forget this many times more slowly than the level (rare events need a
#: long memory: 64 * 24 windows is about five days of five-minute windows).
TAIL_FACTOR = 64.0
#: Drift evidence: an EWMA of the deviation ``z`` (an EWMA control chart on the standardised
#: residuals; smoothing 0.1 is in the 0.05-0.25 range recommended for detecting small sustained
#: shifts, common practice), each window's ``z`` clipped to +-DRIFT_CLIP so that one spike, which
#: ``z`` itself already reports, does not read as a drift. The EWMA is divided by its own learned
#: root mean square (prior: the value for independent normal deviates, ``sqrt(l / (2 - l))``,
#: worth TAIL_PRIOR_WINDOWS windows), so residuals that are autocorrelated in normal operation
#: (a baseline that lags a slow cycle) widen their own scale instead of alerting.
DRIFT_LAMBDA = 0.1
DRIFT_CLIP = TAIL_LEVEL
_DRIFT_VAR0 = DRIFT_LAMBDA / (2.0 - DRIFT_LAMBDA)
_DRIFT_VAR0_PRIOR = _DRIFT_VAR0 * TAIL_PRIOR_WINDOWS
#: Statistics added by model state format 3; a format-2 state reads them as zeros (no drift
#: seen yet, no open cluster), which is the state of a fresh feature.
NEW_IN_FORMAT_3 = ("ez", "ez2", "ezw", "yr", "yw", "yn", "ye", "rr", "rrw")
#: Statistics added by model state format 4 (see HOLD_RATE): the value a feature last repeated
#: and how many windows in a row it has been away from it. A format-3 state reads them as its
#: last value and 0 (the feature is where it was).
NEW_IN_FORMAT_4 = ("held",)
NEW_INTS_IN_FORMAT_4 = ("away",)
#: Statistics added by model state format 5: the repeats of the run in progress, kept out of the
#: repeat rate until the run ends (see ``stuck``), and the error of the blended day profile (see
#: :func:`blend_of`). A format-4 state reads the first as 0 (the repeats of a run in progress are
#: already in the rate, as they were counted then) and the second as the stepped profile's error
#: (so the stepped profile stays in use until the blended one has done better).
NEW_IN_FORMAT_5 = ("rpend", "err1b")
#: Statistics added by model state format 7: how often the feature's metric held one value through a
#: whole window (an EWMA like the repeat rate's, see :func:`repeats`). A format-6 state reads it as
#: the limit :data:`STUCK_MAX_RATE` (not known to be rare), so an upgraded model starts runs at a
#: window that held still only once it has seen that such windows are rare for that metric.
NEW_IN_FORMAT_7 = ("sr",)
#: Prior weight, in windows, of "a run continues as often as a repeat starts" (see ``stuck``).
STUCK_PRIOR_RUNS = 2.0
#: Prior repeats in the rate that judges a run (with one window of prior weight): a whole repeat
#: rather than the half elsewhere, because the run is judged against the rate from before it
#: began, and a rate estimated from a day of windows with no repeat yet must not make three equal
#: windows of a small integer metric look like a one-in-a-million event. Measured on the demo
#: (seeds 7 / 1 / 2, with the run kept out of the rate): half a repeat added a false onset on
#: seed 7 (a queue depth equal three windows running on the first day); one repeat did not, and
#: kept the earlier stuck-metric catches; two lost a catch within 3 windows on seed 1.
STUCK_PRIOR_REPEATS = 1.0
#: A feature that repeats its value in fewer than this share of windows is continuous for
#: practical purposes: its run's own chance (see ``stuck``) is the tail probability. Between
#: this and STUCK_MAX_RATE (values that sometimes repeat, such as rounded or small integer
#: metrics), the run's normal deviate goes through the feature's deviation tail instead, which
#: is more cautious. On the NAB development slice, giving the run's own chance to features that
#: repeat in 3-7 % of windows (low-volume counts) turned their data gaps, long exact repeats
#: outside the labelled windows, into alerts (emitted score 24 against 39).
STUCK_DIRECT_RATE = 0.01
#: A feature (other than the message count, whose spread is Poisson) that repeats its value in
#: at least this share of windows "holds" it: changes in fewer than one window in 20, so the
#: error EWMA behind its scale (about 280 windows) is made of at most about 14 changes, and the
#: scale says little about how large a change may be. Its tail probability is never below its
#: rate of change (with the half repeat of prior evidence of the repeat rate): a routine
#: counter such as restarts then never pages on its own for a one-window change. On the NAB
#: development slice (BENCHMARKS.md; emitted / swept, standard profile; 39.6 / 63.6 without the
#: rule) a limit of 0.5 removed real detections from series that hold about half the time (a
#: key-press counter, low-volume counts), where changes are common enough for their size to be
#: measured: 37.6 / 58.4; 0.9 gave 39.6 / 62.4 and 0.95 39.6 / 63.5 (these three with the floor
#: on every window; the rule as it is, with a second window away judged by its deviation, gives
#: 39.5 / 63.3 at 0.95).
HOLD_RATE = 0.95
# Products of constants used per feature per window (the same products, computed once).
_SQRT2 = math.sqrt(2.0)
_GAUSS_RATE_PRIOR = GAUSS_RATE * TAIL_PRIOR_WINDOWS
_GAUSS_EXCESS_PRIOR = GAUSS_EXCESS * TAIL_PRIOR_EVENTS

try:
    # SeasonalBaseline.compare and the learning loop of update as C loops (models/_baselinecore.c): the same
    # evidence and statistics bit for bit, read and written in place; absent where the install had no C compiler, off with
    # TIDEWATCH_PURE_PYTHON=1. Its constants are these, handed over once.
    from models import _baselinecore
except ImportError:  # pragma: no cover - depends on the install
    _baselinecore = None
if PURE_PYTHON:
    _baselinecore = None
_c_compare = _c_update_loop = _c_learn_evidence = None
if _baselinecore is not None:
    _baselinecore.configure({
        "PREFER_SIMPLER": PREFER_SIMPLER, "MAD_TO_SD": MAD_TO_SD, "Z_LIMIT": Z_LIMIT,
        "STUCK_PRIOR_REPEATS": STUCK_PRIOR_REPEATS, "STUCK_MAX_RATE": STUCK_MAX_RATE,
        "STUCK_PRIOR_RUNS": STUCK_PRIOR_RUNS, "STUCK_DIRECT_RATE": STUCK_DIRECT_RATE, "DRIFT_CLIP": DRIFT_CLIP,
        "DRIFT_LAMBDA": DRIFT_LAMBDA, "_DRIFT_VAR0_PRIOR": _DRIFT_VAR0_PRIOR, "TAIL_PRIOR_WINDOWS": TAIL_PRIOR_WINDOWS,
        "_GAUSS_RATE_PRIOR": _GAUSS_RATE_PRIOR, "_GAUSS_EXCESS_PRIOR": _GAUSS_EXCESS_PRIOR,
        "TAIL_PRIOR_EVENTS": TAIL_PRIOR_EVENTS, "TAIL_LEVEL": TAIL_LEVEL, "_SQRT2": _SQRT2, "HOLD_RATE": HOLD_RATE,
    })
    _c_compare = _baselinecore.compare
    _c_update_loop = _baselinecore.update_loop
    _c_learn_evidence = _baselinecore.learn_evidence


def slots_of(at: float) -> tuple[int, int]:
    """``(hour of day, hour of week)`` of a UTC epoch time; the week starts on Monday 00:00.

    >>> slots_of(1772409600.0)          # 2026-03-02T00:00:00Z, a Monday
    (0, 0)
    >>> slots_of(1772409600.0 + 6 * 86400 + 23.5 * 3600)   # the Sunday after, 23:30
    (23, 167)
    """
    hour = int((at % DAY_S) // _HOUR_S)
    weekday = int(((at + _MONDAY_SHIFT_S) % WEEK_S) // DAY_S)
    return hour, 24 * weekday + hour


def blend_of(at: float) -> tuple[int, int, int, int, float]:
    """Hour of day and hour of week of ``at``, their neighbouring slots and the neighbour's weight.

    A slot's mean stands for the middle of its hour; between two middles the profile's prediction
    is the straight line between them, so a cycle that rises through the hour is not predicted as
    a staircase. Returns ``(hour, how, next_hour, next_how, w)``: the prediction is
    ``(1 - w) * slot[hour] + w * slot[next]``, ``next`` the previous slot in the first half of the
    hour and the following one in the second.

    >>> blend_of(1772409600.0 + 15 * 60)    # Monday 00:15: a quarter of the way from Sunday 23:30
    (0, 0, 23, 167, 0.25)
    >>> blend_of(1772409600.0 + 30 * 60)[4], blend_of(1772409600.0 + 45 * 60)[:4]
    (0.0, (0, 0, 1, 1))
    """
    hour, how = slots_of(at)
    c = (at % _HOUR_S) / _HOUR_S - 0.5
    if c < 0.0:
        return hour, how, (hour - 1) % 24, (how - 1) % 168, -c
    return hour, how, (hour + 1) % 24, (how + 1) % 168, c


# ``steady`` when the caller has no within-window information: every feature "too few to tell".
_NO_STEADY = itertools.repeat(None)


def repeats(x: float, x_last: float, steady: bool | None, run: int, steady_rare: bool) -> bool:
    """Whether a window counts as a repeat of the one before, for the ``stuck`` evidence.

    Without within-window information (``steady`` None: the window saw the metric once, or the
    feature is the message count) a repeat is the same value as the previous window's. When the
    window saw its metric at least twice, a repeat must also have held that one value throughout
    (``steady`` True); and for a metric that rarely holds still for a whole window
    (``steady_rare``: in fewer than :data:`STUCK_MAX_RATE` of windows), the first window that
    does starts a run even though its mean differs from the window before (that one was still
    moving in part). A frozen exporter is then caught in its first whole window rather than its
    second, and judged by how often the metric holds still for a whole window and then repeats,
    which for a metric that moves at every scrape is far rarer than two equal means. A metric
    refreshed once a window holds still in every window; for it only equal windows repeat.

    >>> repeats(3.0, 3.0, None, 0, True), repeats(3.0, 2.5, True, 0, True), repeats(3.0, 2.5, True, 1, True)
    (True, True, False)
    >>> repeats(3.0, 3.0, False, 4, True)        # equal means, but the metric moved within the window
    False
    >>> repeats(3.0, 2.5, True, 0, False), repeats(3.0, 3.0, True, 0, False)   # holds still every window
    (False, True)
    """
    if steady is None:
        return x == x_last
    return bool(steady) and (x == x_last or (run == 0 and steady_rare))


_BLEND_NONE = (0, 0, 0, 0, 0.0)
# The last (at, blend_of(at)), one tuple so that reading it is atomic: compare and update of a window (and every
# service closing at the same time) ask for the same ``at``.
_blend_last: tuple[float, tuple[int, int, int, int, float]] = (math.nan, _BLEND_NONE)


def _blend_at(at: float | None) -> tuple[int, int, int, int, float]:
    """:func:`blend_of` of ``at`` (no blend without a time), remembered for the next call with the same time."""
    global _blend_last
    if at is None:
        return _BLEND_NONE
    last = _blend_last
    if last[0] == at:
        return last[1]
    blend = blend_of(at)
    _blend_last = (at, blend)
    return blend


def tail_deviate(p: float) -> float:
    """Normal deviate whose upper tail probability is ``p`` (0 for ``p >= 0.5``).

    >>> round(tail_deviate(0.0013499), 2), tail_deviate(0.7)
    (3.0, 0.0)
    """
    if p >= 0.5:
        return 0.0
    if p <= 1e-300:
        return 37.5  # the deviate of the smallest positive double, about
    return -_NORMAL.inv_cdf(p)


@dataclass(slots=True)
class Evidence:
    """What the baseline says about one feature of one window."""

    expected: float  #: the chosen prediction (NaN before the feature has been learned)
    z: float  #: signed deviation from ``expected`` on the normal scale
    change: float  #: signed first difference on the normal scale
    stuck: float  #: >= 0, evidence that the value is stuck
    scorable: bool  #: learned at least twice (a scale is known)
    p: float = 1.0  #: this feature's tail probability (the smallest of its three kinds of evidence)
    drift: float = 0.0  #: signed EWMA of ``z`` over its own scale (a sustained deviation)
    held: bool = False  #: ``p`` is the feature's rate of change (see HOLD_RATE), not its tail

    @property
    def strength(self) -> float:
        """The largest of ``|z|`` and ``stuck``: how unusual this feature is on its own."""
        return max(abs(self.z), self.stuck)


# Profile rows of a new feature (copied, never shared). ``H`` (unsigned short) holds the slot
# counts, which stop at 65535 (the uint16 of the state).
_ZERO_DAY, _ZERO_DAY_N = array("d", bytes(8 * 24)), array("H", bytes(2 * 24))
_ZERO_WEEK, _ZERO_WEEK_N = array("d", bytes(8 * 168)), array("H", bytes(2 * 168))


def _blend(row: array, row_n: array, slot: int, other: int, w: float) -> float:
    """A profile's value at ``slot`` moved ``w`` of the way to ``other`` (if that slot was seen)."""
    v = row[slot]
    if w and row_n[other]:
        v += w * (row[other] - v)
    return v


def _stack(rows: list[array], dtype: Any, width: int) -> np.ndarray:
    """The profile rows as one writable ``(len(rows), width)`` array (one copy of their bytes)."""
    return np.frombuffer(bytearray().join(rows), dtype=dtype).reshape(len(rows), width)


def _rows(code: str, values: np.ndarray) -> list[array]:
    """One typed array per row of a checked 2-D state array (a copy of each row's bytes)."""
    out = []
    for row in np.ascontiguousarray(values, dtype=values.dtype.newbyteorder("=")):
        typed = array(code)
        typed.frombytes(memoryview(row).cast("B"))
        out.append(typed)
    return out


class SeasonalBaseline:
    """Level, hour-of-day and hour-of-week predictions per feature (see the module docstring).

    Parameters
    ----------
    half_life
        Half-life of the level and of the profiles' offsets, in windows.
    absolute_floor, relative_floor
        Floor of every scale: ``absolute_floor + relative_floor * |prediction|``.
    """

    _FLOATS = ("level", "lw", "off_day", "off_week", "err0", "err1", "err2", "ew", "ew2",
               "dscale", "dw", "rep", "repw", "last", "xr", "xw", "xn", "xe") + NEW_IN_FORMAT_3 \
        + NEW_IN_FORMAT_4 + NEW_IN_FORMAT_5 + NEW_IN_FORMAT_7
    _INTS = ("count", "run") + NEW_INTS_IN_FORMAT_4

    __slots__ = ("half_life", "alpha", "absolute_floor", "relative_floor", "_names", "_index",
                 "_f", "_i", "_day", "_day_n", "_week", "_week_n", "first_at", "step",
                 "_slot_alphas")

    def __init__(self, half_life: float = 24.0, *, absolute_floor: float = 1e-9,
                 relative_floor: float = 1e-3) -> None:
        self.alpha = alpha_from_half_life(half_life)
        self.half_life = float(half_life)
        if not (math.isfinite(absolute_floor) and absolute_floor > 0):
            raise SettingsError(f"absolute_floor must be > 0, got {absolute_floor!r}")
        if not (math.isfinite(relative_floor) and relative_floor >= 0):
            raise SettingsError(f"relative_floor must be >= 0, got {relative_floor!r}")
        self.absolute_floor = float(absolute_floor)
        self.relative_floor = float(relative_floor)
        self._names: list[str] = []
        self._index: dict[str, int] = {}
        self._f: dict[str, list[float]] = {k: [] for k in self._FLOATS}
        self._i: dict[str, list[int]] = {k: [] for k in self._INTS}
        # Profiles live in plain lists: per-element numpy access costs more than the arithmetic.
        # One typed array per feature: element access costs what a list's does, and the state
        # conversions are a copy of bytes instead of a conversion of every value.
        self._day: list[array] = []
        self._day_n: list[array] = []
        self._week: list[array] = []
        self._week_n: list[array] = []
        self.first_at: float = math.nan  # start of the first window seen with a time
        self.step: float = math.nan  # smallest gap seen between window starts
        # (step, day alpha, week alpha) of the last update: a cache of :meth:`_slot_alpha`,
        # which depends only on the step (not part of the state).
        self._slot_alphas: tuple[float, float, float] = (math.nan, 0.0, 0.0)

    @property
    def features(self) -> tuple[str, ...]:
        """Feature names known so far, in the order they were first seen."""
        return tuple(self._names)

    def locate(self, names: Sequence[str], *, add: bool = False) -> list[int]:
        """Positions of ``names``; -1 for unknown ones unless ``add``."""
        index, out = self._index, []
        for name in names:
            i = index.get(name, -1)
            if i < 0 and add:
                i = index[name] = len(self._names)
                self._names.append(name)
                for k in self._FLOATS:
                    self._f[k].append(0.0)
                for k in self._INTS:
                    self._i[k].append(0)
                self._day.append(array("d", _ZERO_DAY))
                self._day_n.append(array("H", _ZERO_DAY_N))
                self._week.append(array("d", _ZERO_WEEK))
                self._week_n.append(array("H", _ZERO_WEEK_N))
            out.append(i)
        return out

    # ------------------------------------------------------------------ time
    def _cycles(self, at: float | None) -> tuple[bool, bool]:
        """Whether the day and week profiles have seen enough cycles to predict."""
        if at is None or math.isnan(self.first_at):
            return False, False
        span = at - self.first_at
        return span >= MIN_CYCLES * DAY_S, span >= MIN_CYCLES * WEEK_S

    def _slot_alpha(self, cycle_s: float) -> float:
        # Visits per cycle from the window step (one visit per window in the slot's hour).
        per_hour = 1.0 if not (self.step > 0.0) else max(1.0, _HOUR_S / self.step)
        visits = SLOT_HALF_LIFE_CYCLES * per_hour * (cycle_s / DAY_S if cycle_s > DAY_S else 1.0)
        return alpha_from_half_life(visits)

    # ------------------------------------------------------------------ evidence
    def compare(self, idx: Sequence[int], values: Sequence[float], at: float | None,
                steady: Sequence[bool | None] | None = None) -> list[Evidence]:
        """Evidence for ``values`` at positions ``idx`` (from :meth:`locate`), before learning.

        ``steady`` (same order, optional) says for each feature whether its metric held one value
        through the whole window (True), moved within it (False), or was seen too few times to
        tell (None); see :func:`repeats`.
        """
        if steady is not None and len(steady) != len(idx):
            raise ValueError("steady must be as long as idx")
        if _c_compare is not None and type(idx) is list and type(values) is list and (
                steady is None or type(steady) is list):
            # The loop below in C (models/_baselinecore.c), the same evidence bit for bit.
            use_day, use_week = self._cycles(at)
            return _c_compare(self, idx, values, use_day, use_week,
                              _blend_at(at), Evidence, tail_deviate,
                              steady)
        return self._compare(idx, values, at, steady)

    def _compare(self, idx: Sequence[int], values: Sequence[float], at: float | None,
                 steady: Sequence[bool | None] | None = None) -> list[Evidence]:
        """:meth:`compare` in Python: the reference of the C loop, and its fallback."""
        # The predictions, the best-prediction choice and the tail probabilities of
        # :meth:`_predictions`, :meth:`_best` and :meth:`_tail_p` are written out in the loop:
        # it runs once per feature per window, where the calls and the per-call lookups of the
        # statistics cost more than the arithmetic. Every expression keeps its operations and
        # their order, so the results are bit-identical to those helpers'.
        out: list[Evidence] = []
        append = out.append
        f, ints = self._f, self._i
        level, off_d, off_w = f["level"], f["off_day"], f["off_week"]
        err0, err1, err2, ew, ew2 = f["err0"], f["err1"], f["err2"], f["ew"], f["ew2"]
        err1b = f["err1b"]
        dscale, last, rep, repw = f["dscale"], f["last"], f["rep"], f["repw"]
        rpend, sr = f["rpend"], f["sr"]
        ez, ez2, ezw = f["ez"], f["ez2"], f["ezw"]
        rr, rrw = f["rr"], f["rrw"]
        xr, xw, xn, xe = f["xr"], f["xw"], f["xn"], f["xe"]
        yr, yw, yn, ye = f["yr"], f["yw"], f["yn"], f["ye"]
        count, run = ints["count"], ints["run"]
        held, away_n = f["held"], ints["away"]
        use_day, use_week = self._cycles(at)
        hour, how, nh, nw, bw = _blend_at(at)
        day, day_n, week, week_n = self._day, self._day_n, self._week, self._week_n
        floor_abs, floor_rel = self.absolute_floor, self.relative_floor
        names = self._names
        nan, sqrt, erfc, exp, log1p = math.nan, math.sqrt, math.erfc, math.exp, math.log1p
        for i, x, held_through in zip(idx, values, _NO_STEADY if steady is None else steady):
            n = count[i]
            if n == 0:
                append(Evidence(nan, 0.0, 0.0, 0.0, False))
                continue
            p0 = level[i]
            # The profiles' predictions: stepped, or blended with the neighbouring slot (see
            # blend_of) where the blended day profile has been the more accurate.
            e1 = err1[i]
            smooth = err1b[i] < e1
            if smooth:
                e1 = err1b[i]
            if use_day and day_n[i][hour]:
                row = day[i]
                p1 = row[hour]
                if smooth and day_n[i][nh]:
                    p1 += bw * (row[nh] - p1)
                p1 += off_d[i]
            else:
                p1 = p0
            if use_week and week_n[i][how]:
                row = week[i]
                p2 = row[how]
                if smooth and week_n[i][nw]:
                    p2 += bw * (row[nw] - p2)
                p2 += off_w[i]
            else:
                p2 = p1
            e = err0[i]
            p = p0
            if e1 < PREFER_SIMPLER * e:
                e, p = e1, p1
            e2 = err2[i]
            if e2 < PREFER_SIMPLER * e:
                e, p = e2, p2
            if n < 2:
                append(Evidence(p, 0.0, 0.0, 0.0, False))
                continue
            floor = floor_abs + floor_rel * abs(p)
            is_count = names[i] == "count"
            if is_count:
                root = sqrt(abs(p))
                if root > floor:
                    floor = root
            sd = MAD_TO_SD * e
            if floor > sd:
                sd = floor
            share = ew2[i] / (ew[i] * ew[i])  # 1 / effective sample size of the error EWMA
            t = (x - p) / sd
            t = Z_LIMIT if t > Z_LIMIT else -Z_LIMIT if t < -Z_LIMIT else t
            z = 0.0
            if share < 1.0:
                # normal_equivalent(t / sqrt(1 + share), 1 / share - 1), written out.
                tn = t / sqrt(1.0 + share)
                dof = 1.0 / share - 1.0
                if not dof <= 0.0:  # as normal_equivalent tests it (NaN included)
                    z = (8.0 * dof + 1.0) / (8.0 * dof + 3.0) * sqrt(dof * log1p(tn * tn / dof))
                    if not tn >= 0.0:
                        z = -z
            dsd = MAD_TO_SD * dscale[i]
            if floor > dsd:
                dsd = floor
            x_last = last[i]
            c = (x - x_last) / dsd
            c = Z_LIMIT if c > Z_LIMIT else -Z_LIMIT if c < -Z_LIMIT else c
            stuck = 0.0
            p_stuck = 1.0
            q = 1.0
            if repeats(x, x_last, held_through, run[i], (sr[i] + 0.5) / (repw[i] + 1.0) < STUCK_MAX_RATE):
                # Repeat rate with half a repeat of prior evidence. Whether the feature can be
                # stuck at all counts the run in progress (a value that has sat still for most
                # of the recent windows is one that sits still); the run's chance is judged by
                # the rate from before the run (its own repeats would make it look routine).
                q = (rep[i] + STUCK_PRIOR_REPEATS) / (repw[i] + 1.0)
                if (rep[i] + rpend[i] + 0.5) / (repw[i] + 1.0) < STUCK_MAX_RATE:
                    # Repeats as a two-state chain: a repeat starts a run at rate q, and a run
                    # continues at the rate q2 learned from the windows that followed a repeat
                    # (prior: independence, q2 = q, worth STUCK_PRIOR_RUNS windows). A metric
                    # whose repeats come in runs learns a high q2 and gives little evidence; one
                    # that never repeats gives q * q2 ** (r - 1) ~ q ** r; for a continuous
                    # feature (q < STUCK_DIRECT_RATE) that chance is the tail probability itself.
                    q2 = (rr[i] + STUCK_PRIOR_RUNS * q) / (rrw[i] + STUCK_PRIOR_RUNS)
                    p_stuck = q * q2 ** run[i]
                    stuck = tail_deviate(p_stuck)
            zc = DRIFT_CLIP if z > DRIFT_CLIP else -DRIFT_CLIP if z < -DRIFT_CLIP else z
            ez_i = ez[i]
            drift = (ez_i + DRIFT_LAMBDA * (zc - ez_i)) / sqrt(
                (ez2[i] + _DRIFT_VAR0_PRIOR) / (ezw[i] + TAIL_PRIOR_WINDOWS))
            # The "x" tail (deviation) of |z|, and of ``stuck`` when it is judged there.
            rate_x = (xr[i] + _GAUSS_RATE_PRIOR) / (xw[i] + TAIL_PRIOR_WINDOWS)
            beta_x = (xe[i] + _GAUSS_EXCESS_PRIOR) / (xn[i] + TAIL_PRIOR_EVENTS)
            if stuck > 0.0 and q >= STUCK_DIRECT_RATE:
                gauss = erfc(stuck / _SQRT2)
                over = stuck - TAIL_LEVEL
                tail = rate_x * exp(-(over if over > 0.0 else 0.0) / beta_x)
                p_stuck = tail if tail > gauss else gauss
            # Two looks at the deviation (this window, the recent run of windows): the drift's
            # chance counts twice, so a single spike keeps the full sensitivity of ``z``.
            strength = abs(z)
            gauss = erfc(strength / _SQRT2)
            over = strength - TAIL_LEVEL
            tail = rate_x * exp(-(over if over > 0.0 else 0.0) / beta_x)
            p_z = tail if tail > gauss else gauss
            strength = abs(drift)
            gauss = erfc(strength / _SQRT2)
            over = strength - TAIL_LEVEL
            tail = ((yr[i] + _GAUSS_RATE_PRIOR) / (yw[i] + TAIL_PRIOR_WINDOWS)) * exp(
                -(over if over > 0.0 else 0.0)
                / ((ye[i] + _GAUSS_EXCESS_PRIOR) / (yn[i] + TAIL_PRIOR_EVENTS)))
            p_d = 2.0 * (tail if tail > gauss else gauss)
            # min(p_z, p_d, p_stuck), the first smallest as the builtin picks it.
            p_ev = p_z
            if p_d < p_ev:
                p_ev = p_d
            if p_stuck < p_ev:
                p_ev = p_stuck
            is_held = False
            if not is_count:
                q_hold = (rep[i] + rpend[i] + 0.5) / (repw[i] + 1.0)
                away = 0 if x == held[i] or x == x_last else away_n[i] + 1
                if q_hold >= HOLD_RATE and away <= 1:
                    # A feature that holds its value (a restart counter at 0): its deviation
                    # scale is made of a handful of changes, so any change is a huge ``z`` and
                    # the windows after it, while the level decays back, look far off too. Back
                    # at its value or one window away, a window is no rarer than a change of
                    # this feature has been; a second window away in a row (a counter that keeps
                    # counting, a light switched on) is judged by its deviation again.
                    held_p = 1.0 - q_hold
                    if held_p > p_ev:
                        p_ev = held_p
                    is_held = True
            append(Evidence(p, z, c, stuck, True, p_ev, drift, is_held))
        return out

    def _tail_p(self, i: int, strength: float, kind: str) -> float:
        f = self._f
        gauss = math.erfc(strength / math.sqrt(2.0))
        rate = (f[kind + "r"][i] + GAUSS_RATE * TAIL_PRIOR_WINDOWS) / (f[kind + "w"][i] + TAIL_PRIOR_WINDOWS)
        beta = (f[kind + "e"][i] + GAUSS_EXCESS * TAIL_PRIOR_EVENTS) / (f[kind + "n"][i] + TAIL_PRIOR_EVENTS)
        return max(gauss, rate * math.exp(-max(0.0, strength - TAIL_LEVEL) / beta))

    def learn_tail(self, idx: Sequence[int], evidence: Sequence[Evidence]) -> None:
        """Count one window in each feature's tail statistics (done by :meth:`update`; the
        model also calls it for the first window of an alert, when the alert ends, so an alert
        counts as one event).

        Every window counts (not only the first of a run of exceedances): the question asked
        of the tail is how often a *window* is this far out, and a feature whose deviations come
        in bursts has more such windows.
        """
        f = self._f
        k = 0.5 ** (1.0 / (TAIL_FACTOR * self.half_life))
        if _c_learn_evidence is not None and type(idx) is list and type(evidence) is list:
            # The loop below in C (models/_baselinecore.c), the same statistics bit for bit.
            _c_learn_evidence(self, idx, evidence, k, 0.0, False)
            return
        # Both tails ("x": |z|, "y": |drift|) in one pass; they are separate statistics.
        xr, xw, xn, xe = f["xr"], f["xw"], f["xn"], f["xe"]
        yr, yw, yn, ye = f["yr"], f["yw"], f["yn"], f["ye"]
        for i, ev in zip(idx, evidence):
            if not ev.scorable or ev.held:
                # A held feature's change has no measured size (see HOLD_RATE): it must
                # not teach the tail that a second window away is routine.
                continue
            excess = abs(ev.z) - TAIL_LEVEL
            hit = excess > 0.0
            xr[i] = k * xr[i] + (1.0 if hit else 0.0)
            xw[i] = k * xw[i] + 1.0
            xn[i] = k * xn[i] + (1.0 if hit else 0.0)
            xe[i] = k * xe[i] + (excess if hit else 0.0)
            excess = abs(ev.drift) - TAIL_LEVEL
            hit = excess > 0.0
            yr[i] = k * yr[i] + (1.0 if hit else 0.0)
            yw[i] = k * yw[i] + 1.0
            yn[i] = k * yn[i] + (1.0 if hit else 0.0)
            ye[i] = k * ye[i] + (excess if hit else 0.0)

    def reset_drift(self) -> None:
        """Forget the running drift of every feature (the evidence that opened an alert is spent)."""
        ez = self._f["ez"]
        for i in range(len(ez)):
            ez[i] = 0.0

    def _predictions(self, i: int, use_day: bool, use_week: bool, blend: tuple[int, int, int, int, float]
                     ) -> tuple[float, float, float]:
        """The level's and the two profiles' predictions of feature ``i`` (``blend`` from
        :func:`blend_of`)."""
        f = self._f
        hour, how, nh, nw, w = blend
        if not f["err1b"][i] < f["err1"][i]:
            w = 0.0  # the stepped profiles are the more accurate
        p0 = p1 = f["level"][i]
        if use_day and self._day_n[i][hour]:
            p1 = _blend(self._day[i], self._day_n[i], hour, nh, w) + f["off_day"][i]
        p2 = p1
        if use_week and self._week_n[i][how]:
            p2 = _blend(self._week[i], self._week_n[i], how, nw, w) + f["off_week"][i]
        return p0, p1, p2

    def _best(self, i: int) -> int:
        f = self._f
        e0, e1, e2 = f["err0"][i], min(f["err1"][i], f["err1b"][i]), f["err2"][i]
        best, e = 0, e0
        if e1 < PREFER_SIMPLER * e:
            best, e = 1, e1
        if e2 < PREFER_SIMPLER * e:
            best = 2
        return best

    def residuals(self, idx: Sequence[int], values: Sequence[float], at: float | None
                  ) -> list[tuple[float, float, float]]:
        """``x - prediction`` for each of the three predictions (zeros for an unlearned feature)."""
        use_day, use_week = self._cycles(at)
        blend = _blend_at(at)
        out = []
        for i, x in zip(idx, values):
            if self._i["count"][i] == 0:
                out.append((0.0, 0.0, 0.0))
                continue
            p0, p1, p2 = self._predictions(i, use_day, use_week, blend)
            out.append((x - p0, x - p1, x - p2))
        return out

    def shift(self, idx: Sequence[int], offsets: Sequence[tuple[float, float, float]]) -> None:
        """Move each prediction of the features at ``idx`` by the given offsets.

        Used when a level shift has persisted: the shifted baseline predicts the new level
        straight away, while its scales and profile shapes are kept. A feature still repeating
        one value within three of its scales of its prediction is not moved.
        """
        f = self._f
        run, rep, repw, rpend = self._i["run"], f["rep"], f["repw"], f["rpend"]
        for i, (d0, d1, d2) in zip(idx, offsets):
            if run[i] > 0:
                # Frozen at an ordinary value (within three scales of the prediction in use): the
                # repeating is the new normal, not the value. Moved to the frozen value, the level
                # would be off when the metric moves again and open a second alert then.
                b = self._best(i)
                err = (f["err0"][i], min(f["err1"][i], f["err1b"][i]), f["err2"][i])[b]
                if abs((d0, d1, d2)[b]) < TAIL_LEVEL * MAD_TO_SD * err:
                    d0 = d1 = d2 = 0.0
            f["level"][i] += d0
            f["off_day"][i] += d1
            f["off_week"][i] += d2
            if run[i] > 0:
                # A value still repeating is part of the new normal: the feature now counts as
                # one that repeats (twice the stuck limit), so its run does not reopen the
                # alert; the rate decays back as it moves again.
                # The run's own repeats count from now on: they are the new normal.
                rep[i] = max(rep[i] + rpend[i], 2.0 * STUCK_MAX_RATE * (repw[i] + 1.0))
                rpend[i] = 0.0

    # ------------------------------------------------------------------ learning
    def update(self, idx: Sequence[int], values: Sequence[float], at: float | None, *,
               learn: bool = True, evidence: Sequence[Evidence] | None = None,
               steady: Sequence[bool | None] | None = None) -> None:
        """Learn ``values`` at distinct positions ``idx`` (``steady`` as for :meth:`compare`).

        With ``learn=False`` only the previous value and the repeat run are updated (the change
        and stuck evidence need consecutive values even while learning is frozen).
        ``evidence`` (from :meth:`compare`, same order) feeds the per-feature tail statistics
        and the running drift.
        """
        if steady is not None and len(steady) != len(idx):
            raise ValueError("steady must be as long as idx")
        f, ints = self._f, self._i
        last, run = f["last"], ints["run"]
        held, away = f["held"], ints["away"]
        if not learn:
            rep, rpend = f["rep"], f["rpend"]
            for i, x, held_through in zip(idx, values, _NO_STEADY if steady is None else steady):
                if ints["count"][i]:
                    same = repeats(x, last[i], held_through, run[i],
                                   (f["sr"][i] + 0.5) / (f["repw"][i] + 1.0) < STUCK_MAX_RATE)
                    run[i] = run[i] + 1 if same else 0
                    if same:
                        held[i] = x
                    elif rpend[i]:
                        # The run ended while learning is frozen: its learnt repeats join the rate.
                        rep[i] += rpend[i]
                        rpend[i] = 0.0
                    away[i] = 0 if x == held[i] else away[i] + 1
                else:
                    held[i] = x
                last[i] = x
            return
        if evidence is not None:
            kd = 0.5 ** (1.0 / (SCALE_FACTOR * self.half_life))
            if _c_learn_evidence is not None and type(idx) is list and type(evidence) is list:
                # learn_tail and the loop below in one C pass (models/_baselinecore.c), the same statistics.
                _c_learn_evidence(self, idx, evidence, 0.5 ** (1.0 / (TAIL_FACTOR * self.half_life)), kd, True)
                evidence = None  # learnt
        if evidence is not None:
            self.learn_tail(idx, evidence)
            ez, ez2, ezw = f["ez"], f["ez2"], f["ezw"]
            for i, ev in zip(idx, evidence):
                if ev.scorable:
                    z = ev.z
                    zc = DRIFT_CLIP if z > DRIFT_CLIP else -DRIFT_CLIP if z < -DRIFT_CLIP else z
                    ez[i] += DRIFT_LAMBDA * (zc - ez[i])
                    ez2[i] = kd * ez2[i] + ez[i] * ez[i]
                    ezw[i] = kd * ezw[i] + 1.0
        if at is not None:
            if math.isnan(self.first_at):
                self.first_at = at
        use_day, use_week = self._cycles(at)
        hour, how, nh, nw, bw = _blend_at(at)
        a = self.alpha
        keep = 1.0 - a
        ks = 0.5 ** (1.0 / (SCALE_FACTOR * self.half_life))
        kr = 0.5 ** (1.0 / (REPEAT_FACTOR * self.half_life))
        if at is not None:
            cached = self._slot_alphas
            if cached[0] == self.step:  # never true for a NaN step: then it is recomputed
                a_day, a_week = cached[1], cached[2]
            else:
                a_day, a_week = self._slot_alpha(DAY_S), self._slot_alpha(WEEK_S)
                self._slot_alphas = (self.step, a_day, a_week)
        else:
            a_day = a_week = 0.0
        if _c_update_loop is not None and type(idx) is list and type(values) is list and (
                steady is None or type(steady) is list):
            # The loop below in C (models/_baselinecore.c), the same statistics bit for bit.
            _c_update_loop(self, idx, values, at is not None, use_day, use_week, (hour, how, nh, nw, bw),
                           a, keep, ks, kr, a_day, a_week, steady)
            return
        level, lw, off_d, off_w = f["level"], f["lw"], f["off_day"], f["off_week"]
        err0, err1, err2, err1b = f["err0"], f["err1"], f["err2"], f["err1b"]
        ks2 = ks * ks
        ew, ew2, dscale, dw, rep, repw = f["ew"], f["ew2"], f["dscale"], f["dw"], f["rep"], f["repw"]
        rr, rrw, rpend, sr = f["rr"], f["rrw"], f["rpend"], f["sr"]
        count = ints["count"]
        day, day_n, week, week_n = self._day, self._day_n, self._week, self._week_n
        for i, x, held_through in zip(idx, values, _NO_STEADY if steady is None else steady):
            n = count[i]
            if n == 0:
                level[i], lw[i], last[i], held[i] = x, 1.0, x, x
                if at is not None:
                    day[i][hour], day_n[i][hour] = x, 1
                    week[i][how], week_n[i][how] = x, 1
                count[i] = 1
                continue
            # The predictions of :meth:`_predictions`, written out (the same operations).
            p0 = level[i]
            # Both day predictions (stepped ``s1``, blended ``b1``) are kept scored; the one in
            # use and the week's shape follow whichever has been the more accurate.
            smooth = err1b[i] < err1[i]
            if use_day and day_n[i][hour]:
                row = day[i]
                s1 = b1 = row[hour]
                if day_n[i][nh]:
                    b1 = s1 + bw * (row[nh] - s1)
                s1 += off_d[i]
                b1 += off_d[i]
            else:
                s1 = b1 = p0
            p1 = b1 if smooth else s1
            if use_week and week_n[i][how]:
                row = week[i]
                p2 = row[how]
                if smooth and week_n[i][nw]:
                    p2 += bw * (row[nw] - p2)
                p2 += off_w[i]
            else:
                p2 = p1
            # Errors: normalised weights (a running mean at first, as pandas' adjust=True).
            w = ks * ew[i] + 1.0
            err0[i] += (abs(x - p0) - err0[i]) / w
            err1[i] += (abs(x - s1) - err1[i]) / w
            err1b[i] += (abs(x - b1) - err1b[i]) / w
            err2[i] += (abs(x - p2) - err2[i]) / w
            ew[i], ew2[i] = w, ks2 * ew2[i] + 1.0
            wd = ks * dw[i] + 1.0
            x_last = last[i]
            dscale[i] += (abs(x - x_last) - dscale[i]) / wd
            dw[i] = wd
            same = 1.0 if repeats(x, x_last, held_through, run[i],
                                  (sr[i] + 0.5) / (repw[i] + 1.0) < STUCK_MAX_RATE) else 0.0
            # How often the metric holds still all window: same pace as the repeat rate (and its weight).
            sr[i] = kr * sr[i] + (1.0 if held_through else 0.0)
            # A repeat waits in ``rpend`` until its run ends (see ``stuck``); ``rep + rpend`` is
            # the repeat rate's EWMA counting every window.
            rep[i] = kr * rep[i]
            rpend[i] = kr * rpend[i] + same
            repw[i] = kr * repw[i] + 1.0
            if not same:
                rep[i] += rpend[i]
                rpend[i] = 0.0
            if run[i] > 0 and not same:
                # A run of L repeats has ended: L - 1 of the windows after a repeat repeated
                # again, out of L. Learnt only once the run is over, so a run in progress (a
                # frozen exporter) never teaches the model that runs go on.
                length = run[i]
                rr[i] = kr * rr[i] + (length - 1)
                rrw[i] = kr * rrw[i] + length
            run[i] = run[i] + 1 if same else 0
            if same:
                held[i] = x  # the value it repeats (see HOLD_RATE)
            away[i] = 0 if x == held[i] else away[i] + 1
            last[i] = x
            wl = keep * lw[i] + 1.0
            level[i] += (x - level[i]) / wl
            lw[i] = wl
            if at is not None:
                # Offsets follow the level's pace; each slot keeps a slowly forgetting mean.
                row, rown = day[i], day_n[i]
                nd = rown[hour]
                if nd:
                    off_d[i] += a * ((x - row[hour]) - off_d[i])
                    # max(a_day, 1 / (nd + 1)), as the builtin picks it.
                    rate = 1.0 / (nd + 1)
                    row[hour] += (rate if rate > a_day else a_day) * (x - row[hour])
                else:
                    row[hour] = x
                rown[hour] = nd + 1 if nd < 65535 else 65535
                row, rown = week[i], week_n[i]
                # (``seen``, not ``nw``: that name is the blend's neighbouring week slot, which the
                # next feature's prediction reads; reusing it here once read a count as a slot.)
                seen = rown[how]
                if seen:
                    off_w[i] += a * ((x - row[how]) - off_w[i])
                    rate = 1.0 / (seen + 1)
                    row[how] += (rate if rate > a_week else a_week) * (x - row[how])
                else:
                    row[how] = x
                rown[how] = seen + 1 if seen < 65535 else 65535
            count[i] = n + 1

    def observe_step(self, gap: float) -> None:
        """Record the gap between two consecutive window starts (the step is the smallest)."""
        if gap > 0.0 and not (gap >= self.step):
            self.step = gap

    # ------------------------------------------------------------------ Scorer protocol
    def learn_one(self, x: Mapping[str, float], at: float | None = None) -> None:
        """Learn one window's features (non-finite values are skipped)."""
        names, values = split_features(x)
        idx = self.locate(names, add=True)
        ev = self.compare(idx, values, at)
        self.update(idx, values, at, evidence=ev)

    def evidence_one(self, x: Mapping[str, float], at: float | None = None) -> dict[str, Evidence]:
        """Evidence of every known feature of ``x``, without learning."""
        names, values = split_features(x)
        pairs = [(n, i, v) for n, i, v in zip(names, self.locate(names), values) if i >= 0]
        ev = self.compare([i for _, i, _ in pairs], [v for _, _, v in pairs], at)
        return {n: e for (n, _, _), e in zip(pairs, ev)}

    def score_one(self, x: Mapping[str, float], at: float | None = None) -> float:
        """Normal deviate of the smallest per-feature tail probability among the known features
        of ``x`` (:attr:`Evidence.p`, two-sided); 0.0 if none is scorable."""
        ps = [e.p for e in self.evidence_one(x, at).values() if e.scorable]
        return tail_deviate(0.5 * min(ps)) if ps else 0.0

    # ------------------------------------------------------------------ state
    def to_state(self) -> dict[str, Any]:
        """Plain-dict state (numpy arrays for the statistics)."""
        state: dict[str, Any] = {
            "half_life": self.half_life,
            "absolute_floor": self.absolute_floor,
            "relative_floor": self.relative_floor,
            "names": list(self._names),
            "times": np.array([self.first_at, self.step], dtype=np.float64),
            "day": _stack(self._day, np.float64, 24),
            "day_n": _stack(self._day_n, np.uint16, 24),
            "week": _stack(self._week, np.float64, 168),
            "week_n": _stack(self._week_n, np.uint16, 168),
        }
        for k in self._FLOATS:
            state[k] = np.array(self._f[k], dtype=np.float64)
        for k in self._INTS:
            state[k] = np.array(self._i[k], dtype=np.int64)
        return state

    @classmethod
    def from_state(cls, state: Mapping[str, Any], *, upgrade: bool = False) -> SeasonalBaseline:
        """Rebuild from :meth:`to_state` output; malformed states raise ``CorruptState``.

        ``upgrade`` reads a state written by model state format 2, 3 or 4. Format 2 lacks
        :data:`NEW_IN_FORMAT_3`: those start at zero, as for a fresh feature. Formats 2 and 3
        lack :data:`NEW_IN_FORMAT_4` and :data:`NEW_INTS_IN_FORMAT_4`: the held value starts as
        the last value and the count of windows away from it at 0. All three lack
        :data:`NEW_IN_FORMAT_5`: no repeats wait (those of a run in progress are in the rate).
        Formats up to 6 lack :data:`NEW_IN_FORMAT_7`: it starts at the limit (see there).
        """
        if upgrade and isinstance(state, Mapping) and isinstance(state.get("names"), list):
            missing = {k: np.zeros(len(state["names"])) for k in NEW_IN_FORMAT_3 + NEW_IN_FORMAT_5
                       if k not in state}
            for k in NEW_INTS_IN_FORMAT_4:
                if k not in state:
                    missing[k] = np.zeros(len(state["names"]), dtype=np.int64)
            if "held" not in state and isinstance(state.get("last"), np.ndarray):
                missing["held"] = state["last"].copy()
            if "err1b" not in state and isinstance(state.get("err1"), np.ndarray):
                missing["err1b"] = state["err1"].copy()
            if "sr" not in state and isinstance(state.get("repw"), np.ndarray):
                missing["sr"] = STUCK_MAX_RATE * (state["repw"] + 1.0)
            state = {**state, **missing}
        try:
            base = cls(state["half_life"], absolute_floor=state["absolute_floor"],
                       relative_floor=state["relative_floor"])
            names = list(state["names"])
            if not all(isinstance(n, str) for n in names) or len(set(names)) != len(names):
                raise CorruptState("baseline feature names must be distinct strings")
            n = len(names)

            def arr(key: str, shape: tuple[int, ...], dtype: Any) -> np.ndarray:
                a = state[key]
                if not isinstance(a, np.ndarray) or a.shape != shape or a.dtype != dtype:
                    raise CorruptState(f"baseline {key!r} must be a {np.dtype(dtype)} array of {shape}")
                return a

            floats = {k: arr(k, (n,), np.float64).tolist() for k in cls._FLOATS}
            ints = {k: arr(k, (n,), np.int64).tolist() for k in cls._INTS}
            times = arr("times", (2,), np.float64).tolist()
            day, day_n = arr("day", (n, 24), np.float64), arr("day_n", (n, 24), np.uint16)
            week, week_n = arr("week", (n, 168), np.float64), arr("week_n", (n, 168), np.uint16)
        except (KeyError, TypeError, ValueError, SettingsError) as exc:
            raise CorruptState(f"malformed seasonal baseline state: {exc}") from exc
        if not all(math.isfinite(v) for vs in floats.values() for v in vs) or any(
                c < 0 for vs in ints.values() for c in vs) or not (
                np.isfinite(day).all() and np.isfinite(week).all()):
            raise CorruptState("baseline statistics must be finite and counts >= 0")
        base._names = names
        base._index = {name: i for i, name in enumerate(names)}
        base._f, base._i = floats, ints
        base._day, base._day_n = _rows("d", day), _rows("H", day_n)
        base._week, base._week_n = _rows("d", week), _rows("H", week_n)
        base.first_at, base.step = times
        return base
