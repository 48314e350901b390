"""Built-in demo scenario: a week of metrics from an invented organisation, with injected incidents.

The organisation is the *Ostmere Sound Ferry Cooperative*, an invented regional ferry-ticketing
cooperative that runs passenger and vehicle sailings between a mainland port and two island
groups. Its dozen services (``ticket-api``, ``berth-planner``, ``fare-engine``, ...) are scraped
every ``step_s`` seconds; each scrape becomes one native tidewatch message::

    {"service": "ticket-api", "ts": "2026-03-02T00:01:00.412Z",
     "metrics": {"latency_p95_ms": 151.2, "errors": 3, "requests": 1402, ...},
     "labels": {"region": "mainland-port", "env": "prod"}}

What the data contains, and why:

* daily traffic cycles with per-service peak hours, a weekday/weekend difference (blended over a
  few hours around midnight so the weekend does not start with a cliff), slow random wander,
  Poisson counting noise;
* latency, errors, CPU use and queue depth loosely coupled to traffic, memory mostly flat with a
  short dip after every restart, routine deploys (a restart each) on weekday working hours;
* scrape jitter: each service scrapes at its own second of the step, plus jitter, delivery delay
  (so messages may arrive out of event-time order by less than one step), a few missing scrapes
  and short scrape outages;
* injected incidents (:data:`INCIDENT_KINDS`), each on one named service and metric, none in the
  first 1.5 days so that models can warm up, at most one at a time on a service.

Everything is deterministic from the seed. The baseline random draws never depend on the
incidents: incident effects are applied afterwards with their own random streams. So removing an
incident (``dataclasses.replace(scenario, incidents=...)``) changes the data only where that
incident acts, which is what the tests use as a counterfactual.

Examples
--------
>>> from service.scenario import generate
>>> scn = generate(days=3, services=4)
>>> scn.organisation
'Ostmere Sound Ferry Cooperative'
>>> scn.services
('ticket-api', 'berth-planner', 'fare-engine', 'boarding-gate')
>>> sorted({inc.kind for inc in scn.incidents}) == sorted(INCIDENT_KINDS)
True
>>> first = next(scn.messages())
>>> sorted(first)
['labels', 'metrics', 'service', 'ts']
"""

from __future__ import annotations

import math
import os
import re
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field

import numpy as np
import orjson

__all__ = [
    "INCIDENT_KINDS",
    "INCIDENT_METRICS",
    "ORGANISATION",
    "SCENARIO_START",
    "TS_FORMS",
    "WARM_UP_S",
    "Incident",
    "Scenario",
    "ScenarioError",
    "generate",
]


class ScenarioError(ValueError):
    """A scenario cannot be built or rendered with the given parameters."""


ORGANISATION = "Ostmere Sound Ferry Cooperative"

#: 2026-03-02T00:00:00Z, a Monday.
SCENARIO_START = 1772409600.0

#: Incidents start no earlier than this after the scenario start (the models' warm-up).
WARM_UP_S = 1.5 * 86400.0

INCIDENT_KINDS = (
    "latency_spike",
    "error_burst",
    "traffic_drop",
    "memory_leak",
    "level_shift",
    "stuck_metric",
)

#: Which metrics an incident of each kind may be attached to.
INCIDENT_METRICS: dict[str, tuple[str, ...]] = {
    "latency_spike": ("latency_p95_ms",),
    "error_burst": ("errors",),
    "traffic_drop": ("requests",),
    "memory_leak": ("memory_mb",),
    "level_shift": ("latency_p95_ms", "cpu_util", "memory_mb"),
    "stuck_metric": ("cpu_util", "memory_mb", "latency_p95_ms", "queue_depth"),
}

#: The three accepted ``ts`` forms; each service uses one of them.
TS_FORMS = ("rfc3339", "epoch_s", "epoch_ms")

_DAY = 86400.0
_WEEK = 7 * _DAY
_MONDAY0 = 4 * _DAY  # 1970-01-05T00:00:00Z was a Monday
_MIN_DAYS = 2.5
_MAX_STEP_S = 600.0
_MIN_STEP_S = 1.0
_BLOCK_STEPS = 240  # rendering block: bounds memory for many services and keeps messages() lazy
_GAP_S = 3 * 3600.0  # quiet time kept around incidents on one service, so each stands on its own
_END_MARGIN_S = 2 * 3600.0
_RECOVERY_S = 4 * 3600.0  # after a restart memory warms back up within this time
_WARM_DIP = 0.08
_WARM_TAU_S = 2700.0
_LEVEL_SHIFT_MIN_AFTER_S = 12 * 3600.0
_DEPLOY_HOURS = (8.0, 16.0)  # level-shift deploys: weekday working hours
_ROUTINE_DEPLOY_HOURS = (9.0, 17.0)
_P_MISSING = 0.002
_P_BLIP = 0.0005

_METRIC_ORDER = (
    "latency_p95_ms",
    "errors",
    "requests",
    "cpu_util",
    "memory_mb",
    "restarts",
    "queue_depth",
)
_METRIC_WORDS = {
    "latency_p95_ms": "p95 latency",
    "errors": "errors",
    "requests": "traffic",
    "cpu_util": "CPU use",
    "memory_mb": "memory",
    "queue_depth": "queue depth",
}
_KIND_CODE = {kind: i + 1 for i, kind in enumerate(INCIDENT_KINDS)}
# How often each kind is drawn for incidents beyond the first one of each kind.
_EXTRA_KINDS = ("latency_spike", "error_burst", "traffic_drop", "memory_leak", "stuck_metric", "level_shift")
_EXTRA_WEIGHTS = (0.26, 0.22, 0.16, 0.10, 0.14, 0.12)

# Stream identifiers for np.random.default_rng keys; distinct so that streams never collide.
_S_PROFILE, _S_SERVICE, _S_BLOCK, _S_PLAN, _S_EFFECT, _S_EFFECT_NOISE, _S_BAD = range(101, 108)


@dataclass(frozen=True, slots=True)
class Incident:
    """One injected incident: a named service and metric misbehave from ``start`` to ``end``.

    ``start`` is inclusive and ``end`` exclusive, both epoch seconds on the scrape grid. A
    ``memory_leak`` ends with a restart at ``end``; a ``level_shift`` lasts to the end of the
    scenario (it becomes the new normal).

    Examples
    --------
    >>> inc = Incident("ticket-api", "latency_p95_ms", "latency_spike", 1772560800.0, 1772563200.0,
    ...                "A slow query makes ticket-api p95 latency about 3x its usual level.")
    >>> inc.end - inc.start
    2400.0
    """

    service: str
    metric: str
    kind: str
    start: float
    end: float
    description: str


@dataclass(frozen=True, slots=True)
class _Template:
    name: str
    region: str
    peaks: tuple[tuple[float, float, float], ...]  # (hour UTC, width in hours, weight)
    floor: float  # trough traffic relative to the weekday peak
    weekend: float  # weekend traffic relative to weekdays
    latency_ms: float  # p95 latency at low load
    peak_rpm: float  # requests per minute at the weekday peak
    queue: bool


# Consumer-facing services peak around commuting sailings and evenings and are busier at
# weekends; back-office ones follow working hours and are quiet at weekends. Troughs are kept at
# >= 10 requests per minute so that error bursts and traffic drops are visible at night as well.
_CATALOGUE = (
    _Template("ticket-api", "mainland-port", ((8.0, 1.6, 1.0), (17.5, 2.0, 0.9)), 0.12, 1.20, 140.0, 1400.0, False),
    _Template("berth-planner", "north-isles", ((6.0, 2.5, 1.0),), 0.20, 0.70, 220.0, 160.0, True),
    _Template("fare-engine", "mainland-port", ((10.0, 3.0, 1.0), (19.0, 2.0, 0.5)), 0.10, 1.10, 60.0, 2200.0, False),
    _Template("boarding-gate", "south-isles", ((7.0, 1.2, 1.0), (16.5, 1.5, 0.8)), 0.05, 0.85, 90.0, 600.0, False),
    _Template("vehicle-deck-booker", "mainland-port", ((20.5, 2.5, 1.0), (12.0, 2.0, 0.4)), 0.08, 1.35, 260.0, 300.0, False),
    _Template("payment-bridge", "mainland-port", ((12.5, 3.5, 1.0),), 0.10, 1.15, 320.0, 900.0, True),
    _Template("crew-roster", "north-isles", ((5.5, 1.5, 1.0), (13.0, 2.0, 0.6)), 0.14, 0.50, 180.0, 150.0, False),
    _Template("freight-manifest", "south-isles", ((4.0, 2.0, 1.0), (14.0, 3.0, 0.5)), 0.15, 0.50, 240.0, 250.0, True),
    _Template("timetable-feed", "north-isles", ((7.5, 2.5, 1.0), (18.0, 3.0, 0.7)), 0.25, 0.80, 45.0, 3000.0, False),
    _Template("notification-relay", "south-isles", ((16.0, 3.0, 1.0),), 0.15, 1.00, 110.0, 700.0, True),
    _Template("harbour-telemetry", "north-isles", ((13.0, 6.0, 1.0),), 0.60, 1.00, 35.0, 1800.0, True),
    _Template("loyalty-ledger", "mainland-port", ((21.0, 2.0, 1.0), (9.0, 2.0, 0.4)), 0.07, 1.25, 150.0, 200.0, False),
    _Template("refund-desk", "mainland-port", ((10.5, 2.0, 1.0), (14.5, 2.0, 0.8)), 0.14, 0.55, 200.0, 150.0, False),
    _Template("weather-bulletin", "south-isles", ((5.0, 1.0, 1.0), (11.0, 1.0, 0.8), (17.0, 1.0, 0.8)), 0.30, 0.95, 70.0, 400.0, False),
)
_TEMPLATE_INDEX = {t.name: i for i, t in enumerate(_CATALOGUE)}
_REPLICA_NAME = re.compile(r"^(?P<base>[a-z][a-z-]*[a-z])-(?P<n>[0-9]+)$")


@dataclass(frozen=True, slots=True)
class _Profile:
    """Per-seed parameters of one service (drawn once from the template)."""

    index: int
    name: str
    region: str
    ts_form: str
    peaks: tuple[tuple[float, float, float], ...]
    floor: float
    weekend: float
    weekend_delay_h: float
    peak_rpm: float
    latency_ms: float
    latency_load: float
    error_rate: float
    cpu_base: float
    cpu_load: float
    memory_mb: float
    queue_scale: float  # 0 for services without a queue
    queue_floor: float
    phase: float  # fraction of the step at which this service's scraper fires
    deploys_per_week: float

    @property
    def metrics(self) -> tuple[str, ...]:
        return _METRIC_ORDER if self.queue_scale > 0 else _METRIC_ORDER[:-1]


def _service_name(i: int) -> str:
    base = _CATALOGUE[i % len(_CATALOGUE)].name
    replica = i // len(_CATALOGUE)
    return base if replica == 0 else f"{base}-{replica + 1}"


def _service_index(name: str) -> int:
    if name in _TEMPLATE_INDEX:
        return _TEMPLATE_INDEX[name]
    m = _REPLICA_NAME.match(name)
    if m and m["base"] in _TEMPLATE_INDEX and int(m["n"]) >= 2:
        return (int(m["n"]) - 1) * len(_CATALOGUE) + _TEMPLATE_INDEX[m["base"]]
    raise ScenarioError(f"unknown service {name!r}: scenarios only contain the services generate() names")


def _profile(seed: int, i: int) -> _Profile:
    t = _CATALOGUE[i % len(_CATALOGUE)]
    rng = np.random.default_rng([seed, _S_PROFILE, i])
    peaks = tuple((h + float(rng.uniform(-0.6, 0.6)), w, wt) for h, w, wt in t.peaks)
    rpm = t.peak_rpm * float(rng.lognormal(0.0, 0.2))
    # keep the quietest hour of the quietest day at >= 10 requests per minute (see _CATALOGUE)
    floor = max(t.floor, 10.0 / (rpm * min(t.weekend, 1.0)))
    has_queue = t.queue
    form = TS_FORMS[1] if i % 6 == 1 else TS_FORMS[2] if i % 6 == 2 else TS_FORMS[0]
    return _Profile(
        index=i,
        name=_service_name(i),
        region=t.region,
        ts_form=form,
        peaks=peaks,
        floor=min(floor, 0.9),
        weekend=t.weekend * float(rng.uniform(0.95, 1.05)),
        weekend_delay_h=float(rng.uniform(0.5, 1.5)),
        peak_rpm=rpm,
        latency_ms=t.latency_ms * float(rng.lognormal(0.0, 0.15)),
        latency_load=float(rng.uniform(0.3, 0.8)),
        error_rate=float(rng.uniform(0.001, 0.006)),
        cpu_base=float(rng.uniform(0.05, 0.15)),
        cpu_load=float(rng.uniform(0.25, 0.55)),
        memory_mb=float(np.round(math.exp(rng.uniform(math.log(300), math.log(3000))), -1)),
        queue_scale=float(rng.uniform(10.0, 60.0)) if has_queue else 0.0,
        queue_floor=float(rng.uniform(2.0, 6.0)),
        phase=float(rng.uniform(0.15, 0.85)),
        deploys_per_week=float(rng.uniform(1.0, 3.0)),
    )


# --------------------------------------------------------------------------- calendar helpers


def _weekday(t: np.ndarray) -> np.ndarray:
    """Monday = 0 ... Sunday = 6 (UTC)."""
    return ((np.floor(t / _DAY).astype(np.int64) + 3) % 7).astype(np.int64)


def _hour(t: np.ndarray) -> np.ndarray:
    return np.mod(t, _DAY) / 3600.0


def _sigmoid(x: np.ndarray) -> np.ndarray:
    return 0.5 * (1.0 + np.tanh(0.5 * x))  # tanh form: no overflow for large |x|


def _weekend_weight(t: np.ndarray, tau_s: float = 1.5 * 3600.0) -> np.ndarray:
    """Smooth 0..1 weight that is ~1 on Saturday and Sunday, blended over a few hours at midnight."""
    ws = np.floor((t - _MONDAY0) / _WEEK) * _WEEK + _MONDAY0
    return (
        _sigmoid((t - ws - 5 * _DAY) / tau_s)
        - _sigmoid((t - ws - 7 * _DAY) / tau_s)
        + 1.0
        - _sigmoid((t - ws) / tau_s)
    )


def _snap(t: float, start: float, step: float) -> float:
    return start + round((t - start) / step) * step


# --------------------------------------------------------------------------- per-service context


@dataclass(slots=True)
class _Effect:
    incident: Incident
    value: float  # magnitude; meaning depends on the kind (see _magnitude)


@dataclass(slots=True)
class _Context:
    """Everything needed to render any block of one service, computed once per messages() call."""

    profile: _Profile
    seed: int
    start: float
    step: float
    n_steps: int
    knot_t: np.ndarray
    wander: dict[str, np.ndarray]
    restart_times: np.ndarray  # sorted epoch seconds, on the grid
    restart_rows: np.ndarray  # sorted grid indices
    forced_rows: np.ndarray  # grid indices that are never missing
    outage: np.ndarray  # (n, 2) grid index ranges [a, b) of scrape outages
    effects: list[_Effect]
    frozen: dict[int, float] = field(default_factory=dict)  # stuck incident id -> frozen value
    labels: dict[str, str] = field(default_factory=dict)


def _routine_deploys(seed: int, p: _Profile, start: float, end: float, step: float) -> np.ndarray:
    """Routine deploys (one restart each) on weekday working hours; not incidents."""
    rng = np.random.default_rng([seed, _S_SERVICE, p.index, 1])
    days = (end - start) / _DAY
    count = int(rng.poisson(p.deploys_per_week * days / 7.0))
    day_idx = rng.integers(0, max(1, int(math.ceil(days))), size=count)
    hours = rng.uniform(*_ROUTINE_DEPLOY_HOURS, size=count)
    out = []
    for d, h in zip(day_idx.tolist(), hours.tolist()):
        t = _snap(start + d * _DAY + h * 3600.0, start, step)
        if start <= t < end and _weekday(np.array([t]))[0] < 5:
            out.append(t)
    return np.array(sorted(set(out)), dtype=np.float64)


def _magnitude(seed: int, inc: Incident) -> float:
    """Size of an incident's effect; drawn from the incident's identity, so it is reproducible."""
    rng = np.random.default_rng(
        [seed, _S_EFFECT, _KIND_CODE[inc.kind], zlib.crc32(inc.service.encode()),
         zlib.crc32(inc.metric.encode()), int(inc.start)]
    )
    if inc.kind == "latency_spike":
        return float(rng.uniform(2.5, 4.0))  # multiplier
    if inc.kind == "error_burst":
        return float(rng.uniform(0.12, 0.30))  # fraction of requests failing
    if inc.kind == "traffic_drop":
        return float(rng.uniform(0.20, 0.45))  # remaining fraction of traffic
    if inc.kind == "memory_leak":
        return float(rng.uniform(0.5, 0.9))  # growth relative to normal memory by the end
    if inc.kind == "level_shift":
        if inc.metric == "cpu_util":
            return float(rng.uniform(0.10, 0.18))  # added utilisation
        if inc.metric == "latency_p95_ms":
            return float(rng.uniform(1.35, 1.6))  # multiplier
        return float(rng.uniform(1.2, 1.35))  # memory multiplier
    return 0.0  # stuck_metric: the value is frozen, there is no size


def _build_context(scn: Scenario, name: str) -> _Context:
    p = _profile(scn.seed, _service_index(name))
    n_steps = _n_steps(scn.start, scn.end, scn.step_s)
    rng = np.random.default_rng([scn.seed, _S_SERVICE, p.index, 0])
    # slow wander: random knots every two hours, linearly interpolated (vectorised, block-friendly)
    knot_dt = 2 * 3600.0
    n_knots = int(math.ceil((scn.end - scn.start) / knot_dt)) + 2
    knot_t = scn.start + knot_dt * np.arange(n_knots)
    wander = {
        "requests": rng.normal(0.0, 0.06, n_knots),
        "latency_p95_ms": rng.normal(0.0, 0.04, n_knots),
        "cpu_util": rng.normal(0.0, 0.01, n_knots),
        "memory_mb": rng.normal(0.0, 0.015, n_knots),
    }
    # scrape outages: a few runs of 2-6 consecutive missing scrapes
    n_out = int(rng.poisson(0.15 * (scn.end - scn.start) / _DAY))
    a = rng.integers(0, max(1, n_steps - 6), size=n_out)
    outage = np.stack([a, a + rng.integers(2, 7, size=n_out)], axis=1) if n_out else np.zeros((0, 2), np.int64)

    effects = [_Effect(inc, _magnitude(scn.seed, inc)) for inc in scn.incidents if inc.service == name]
    restarts = list(_routine_deploys(scn.seed, p, scn.start, scn.end, scn.step_s).tolist())
    forced = []
    for e in effects:
        inc = e.incident
        if inc.kind == "memory_leak" and inc.end < scn.end:
            restarts.append(inc.end)  # the leak ends with a restart
        elif inc.kind == "level_shift":
            restarts.append(inc.start)  # the shift comes with a deploy
        elif inc.kind == "stuck_metric":
            forced.append(_row(inc.start, scn) - 1)  # the last good report must exist
    restart_times = np.array(sorted(set(restarts)), dtype=np.float64)
    restart_rows = np.rint((restart_times - scn.start) / scn.step_s).astype(np.int64)
    forced_rows = np.unique(np.concatenate([restart_rows, np.array(forced, dtype=np.int64)]))
    return _Context(
        profile=p,
        seed=scn.seed,
        start=scn.start,
        step=scn.step_s,
        n_steps=n_steps,
        knot_t=knot_t,
        wander=wander,
        restart_times=restart_times,
        restart_rows=restart_rows,
        forced_rows=forced_rows,
        outage=outage,
        effects=effects,
        labels={"region": p.region, "env": "prod"},
    )


def _n_steps(start: float, end: float, step: float) -> int:
    return int(math.floor((end - start) / step + 1e-9))


def _row(t: float, scn: Scenario) -> int:
    return int(round((t - scn.start) / scn.step_s))


