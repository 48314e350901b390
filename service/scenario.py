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
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np
import orjson

from service.errors import TidewatchError

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


class ScenarioError(TidewatchError, ValueError):
    """A scenario cannot be built or rendered with the given parameters (a ``ValueError`` too)."""


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
INCIDENT_METRICS: Mapping[str, tuple[str, ...]] = MappingProxyType({
    "latency_spike": ("latency_p95_ms",),
    "error_burst": ("errors",),
    "traffic_drop": ("requests",),
    "memory_leak": ("memory_mb",),
    "level_shift": ("latency_p95_ms", "cpu_util", "memory_mb"),
    "stuck_metric": ("cpu_util", "memory_mb", "latency_p95_ms", "queue_depth"),
})

#: The three accepted ``ts`` forms; each service uses one of them.
TS_FORMS = ("rfc3339", "epoch_s", "epoch_ms")

_DAY = 86400.0
_WEEK = 7 * _DAY
_MONDAY0 = 4 * _DAY  # 1970-01-05T00:00:00Z was a Monday
_MIN_DAYS = 3.0
_PLAN_ATTEMPTS = 40
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
        weekend_delay_h=float(rng.uniform(0.5, 1.5)),  # weekend peaks come a little later
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


def _weekend_weight(t: np.ndarray, tau_s: float = 3600.0) -> np.ndarray:
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
    restart_mask: np.ndarray  # bool per grid row: a restart is reported there
    forced_mask: np.ndarray  # bool per grid row: never missing (restarts, last report before a freeze)
    outage_mask: np.ndarray  # bool per grid row: inside a scrape outage
    shape_top: float  # normaliser of the diurnal shape
    effects: list[_Effect]
    frozen: dict[int, float] = field(default_factory=dict)  # index in effects -> frozen value
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
            return float(rng.uniform(0.12, 0.20))  # added utilisation
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
    outage_mask = np.zeros(n_steps, dtype=bool)
    for a, length in zip(rng.integers(0, max(1, n_steps - 6), size=n_out).tolist(),
                         rng.integers(2, 7, size=n_out).tolist()):
        outage_mask[a : a + length] = True

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
            forced.append(_row(inc.start, scn.start, scn.step_s) - 1)  # the last good report must exist
    restart_times = np.array(sorted(set(restarts)), dtype=np.float64)
    restart_rows = np.rint((restart_times - scn.start) / scn.step_s).astype(np.int64)
    restart_mask = np.zeros(n_steps, dtype=bool)
    restart_mask[restart_rows[(restart_rows >= 0) & (restart_rows < n_steps)]] = True
    forced_mask = restart_mask.copy()
    forced_rows = np.array([r for r in forced if 0 <= r < n_steps], dtype=np.int64)
    forced_mask[forced_rows] = True
    return _Context(
        profile=p,
        seed=scn.seed,
        start=scn.start,
        step=scn.step_s,
        n_steps=n_steps,
        knot_t=knot_t,
        wander=wander,
        restart_times=restart_times,
        restart_mask=restart_mask,
        forced_mask=forced_mask,
        outage_mask=outage_mask,
        shape_top=_shape_top(p),
        effects=effects,
        labels={"region": p.region, "env": "prod"},
    )


def _n_steps(start: float, end: float, step: float) -> int:
    return int(math.floor((end - start) / step + 1e-9))


def _row(t: float, start: float, step: float) -> int:
    return int(round((t - start) / step))


# --------------------------------------------------------------------------- block rendering


def _bumps(p: _Profile, hour: np.ndarray) -> np.ndarray:
    out = np.zeros_like(hour)
    for h0, width, weight in p.peaks:
        d = np.mod(hour - h0 + 12.0, 24.0) - 12.0  # circular distance in hours
        out += weight * np.exp(-0.5 * (d / width) ** 2)
    return out


def _shape_top(p: _Profile) -> float:
    return float(_bumps(p, np.linspace(0.0, 24.0, 24 * 60 + 1)).max())


def _shape(p: _Profile, hour: np.ndarray, top: float) -> np.ndarray:
    """Diurnal traffic shape in [floor, 1]: a floor plus Gaussian bumps around the peak hours."""
    return p.floor + (1.0 - p.floor) * _bumps(p, hour) / top


def _since_restart(ctx: _Context, t: np.ndarray) -> np.ndarray:
    if ctx.restart_times.size == 0:
        return np.full(t.shape, np.inf)
    idx = np.searchsorted(ctx.restart_times, t, side="right") - 1
    last = ctx.restart_times[np.maximum(idx, 0)]
    return np.where(idx >= 0, t - last, np.inf)


def _effect_rng(ctx: _Context, inc: Incident, k0: int) -> np.random.Generator:
    return np.random.default_rng(
        [ctx.seed, _S_EFFECT_NOISE, _KIND_CODE[inc.kind], zlib.crc32(inc.service.encode()),
         int(inc.start), k0 // _BLOCK_STEPS]
    )


def _render_block(ctx: _Context, k0: int, k1: int) -> tuple[np.ndarray, list[dict]]:
    """Render grid rows ``[k0, k1)`` of one service; returns (arrival times, messages)."""
    p = ctx.profile
    step = ctx.step
    k = np.arange(k0, k1, dtype=np.int64)
    n = k.size
    nominal = ctx.start + k * step
    rng = np.random.default_rng([ctx.seed, _S_BLOCK, p.index, k0 // _BLOCK_STEPS])

    # --- timing: the scraper fires at its phase of the step plus jitter; ts stays inside its step
    jitter = np.clip(rng.normal(0.0, 0.02 * step, n), -0.1 * step, 0.1 * step)
    ts_ms = np.rint((nominal + p.phase * step + jitter) * 1000.0).astype(np.int64)
    ts = ts_ms / 1000.0
    missing = ((rng.random(n) < _P_MISSING) | ctx.outage_mask[k0:k1]) & ~ctx.forced_mask[k0:k1]
    delay = np.minimum(rng.exponential(0.012 * step, n), 0.45 * step)

    # --- baseline draws: fixed order and count, never dependent on the incidents
    we = _weekend_weight(nominal)
    hour = np.mod(_hour(nominal) - p.weekend_delay_h * we, 24.0)
    load = _shape(p, hour, ctx.shape_top) * (1.0 + (p.weekend - 1.0) * we)
    load *= np.exp(np.interp(nominal, ctx.knot_t, ctx.wander["requests"]))
    per_scrape = p.peak_rpm * step / 60.0
    requests = rng.poisson(per_scrape * load * np.exp(rng.normal(0.0, 0.03, n)))
    err_frac = np.minimum(p.error_rate * (1.0 + 1.5 * load**2), 0.5)
    errors = rng.binomial(requests, err_frac)
    lat_noise = rng.normal(0.0, 0.07, n) + np.interp(nominal, ctx.knot_t, ctx.wander["latency_p95_ms"])
    blip = np.where(rng.random(n) < _P_BLIP, rng.uniform(1.4, 2.0, n), 1.0)  # single-scrape pauses
    cpu_noise = rng.normal(0.0, 0.012, n) + np.interp(nominal, ctx.knot_t, ctx.wander["cpu_util"])
    mem_noise = rng.normal(0.0, 0.003, n)
    mem_wander = np.interp(nominal, ctx.knot_t, ctx.wander["memory_mb"])
    queue = rng.poisson(p.queue_floor + p.queue_scale * load**3) if p.queue_scale > 0 else None

    masks = [(ts >= e.incident.start) & (ts < e.incident.end) for e in ctx.effects]

    # --- a traffic drop acts before the coupled metrics (latency, CPU, queue) are derived
    eff_load = load.copy()
    for e, m in zip(ctx.effects, masks):
        if e.incident.kind == "traffic_drop" and m.any():
            irng = _effect_rng(ctx, e.incident, k0)
            # binomial thinning keeps the baseline draws and yields Poisson(f * rate) counts
            requests[m] = irng.binomial(requests[m], e.value)
            errors[m] = np.minimum(irng.binomial(errors[m], e.value), requests[m])
            eff_load[m] *= e.value
            if queue is not None:
                queue[m] = irng.binomial(queue[m], e.value**3)

    latency = p.latency_ms * (1.0 + p.latency_load * eff_load**2) * np.exp(lat_noise) * blip
    cpu = p.cpu_base + p.cpu_load * eff_load + cpu_noise
    since = _since_restart(ctx, nominal)
    warm = np.where(since < _RECOVERY_S, 1.0 - _WARM_DIP * np.exp(-since / _WARM_TAU_S), 1.0)
    memory = p.memory_mb * ((1.0 + 0.03 * eff_load + mem_wander) * warm + mem_noise)
    restarts = ctx.restart_mask[k0:k1].astype(np.int64)

    for e, m in zip(ctx.effects, masks):
        inc = e.incident
        if not m.any():
            continue
        if inc.kind == "latency_spike":
            latency[m] *= e.value * np.exp(_effect_rng(ctx, inc, k0).normal(0.0, 0.08, int(m.sum())))
        elif inc.kind == "error_burst":
            base = err_frac[m]
            extra_p = np.clip((e.value - base) / (1.0 - base), 0.0, 1.0)
            errors[m] += _effect_rng(ctx, inc, k0).binomial(requests[m] - errors[m], extra_p)
        elif inc.kind == "memory_leak":
            memory[m] += p.memory_mb * e.value * (ts[m] - inc.start) / (inc.end - inc.start)
        elif inc.kind == "level_shift":
            if inc.metric == "cpu_util":
                cpu[m] += e.value
            elif inc.metric == "latency_p95_ms":
                latency[m] *= e.value
            else:
                memory[m] *= e.value

    cols: dict[str, np.ndarray] = {
        "latency_p95_ms": np.round(latency, 1),
        "errors": errors,
        "requests": requests,
        "cpu_util": np.round(np.clip(cpu, 0.01, 0.99), 4),
        "memory_mb": np.round(memory, 1),
        "restarts": restarts,
    }
    if queue is not None:
        cols["queue_depth"] = queue

    # --- stuck metrics last: they repeat the last value reported before the onset, exactly
    for i, (e, m) in enumerate(zip(ctx.effects, masks)):
        inc = e.incident
        if inc.kind != "stuck_metric":
            continue
        col = cols[inc.metric]
        last = _row(inc.start, ctx.start, step) - 1
        if k0 <= last < k1:
            ctx.frozen[i] = col[last - k0].item()
        if m.any():
            if i not in ctx.frozen:
                raise ScenarioError(f"stuck_metric on {inc.service} starts before the scenario has data")
            col[m] = ctx.frozen[i]

    keep = ~missing
    names = [name for name in _METRIC_ORDER if name in cols]
    lists = [cols[name][keep].tolist() for name in names]
    kept_ms = ts_ms[keep]
    if p.ts_form == "rfc3339":
        stamps = np.datetime_as_string(kept_ms.astype("datetime64[ms]"), unit="ms", timezone="UTC").tolist()
    elif p.ts_form == "epoch_s":
        stamps = (kept_ms / 1000.0).tolist()
    else:
        stamps = kept_ms.tolist()
    service, labels = p.name, ctx.labels
    msgs = [
        {"service": service, "ts": stamp, "metrics": dict(zip(names, row)), "labels": dict(labels)}
        for stamp, row in zip(stamps, zip(*lists))
    ]
    return (ts + delay)[keep], msgs


def _stream(contexts: list[_Context], start: float, step: float, n_steps: int) -> Iterator[dict]:
    """Render block by block and yield messages in arrival order.

    Every message of the next block has ``ts >= start + k1 * step`` (the scraper phase keeps each
    timestamp inside its own step), so messages of this block arriving before that bound are
    final; later ones are carried over and merged with the next block.
    """
    carry_arr = np.zeros(0)
    carry_msgs: list[dict] = []
    for k0 in range(0, n_steps, _BLOCK_STEPS):
        k1 = min(k0 + _BLOCK_STEPS, n_steps)
        arrs = [carry_arr]
        msgs = carry_msgs
        for ctx in contexts:
            arr, block_msgs = _render_block(ctx, k0, k1)
            arrs.append(arr)
            msgs.extend(block_msgs)
        arrival = np.concatenate(arrs)
        order = np.argsort(arrival, kind="stable")
        bound = start + k1 * step if k1 < n_steps else np.inf
        cut = int(np.searchsorted(arrival[order], bound, side="left"))
        for j in order[:cut].tolist():
            yield msgs[j]
        rest = order[cut:]
        carry_arr = arrival[rest]
        carry_msgs = [msgs[j] for j in rest.tolist()]


# --------------------------------------------------------------------------- bad lines


def _bad_line(kind: int, msg: dict) -> bytes:
    """One deliberately malformed line, made from a real message so it looks plausible."""
    service = msg["service"]
    stamp = msg["ts"]
    metrics = msg["metrics"]
    if kind == 0:  # not JSON: a line cut off mid-write
        whole = orjson.dumps(msg)
        return whole[: max(10, len(whole) // 2)]
    if kind == 1:  # no service
        return orjson.dumps({"ts": stamp, "metrics": metrics, "labels": msg["labels"]})
    if kind == 2:  # a metric value sent as a string with its unit
        name, value = next(iter(metrics.items()))
        bad = dict(metrics)
        bad[name] = f"{value} units"
        return orjson.dumps({"service": service, "ts": stamp, "metrics": bad})
    if kind == 3:  # a timestamp that is neither RFC 3339 nor an epoch number
        return orjson.dumps({"service": service, "ts": "last tuesday", "metrics": metrics})
    if kind == 4:  # metrics as a list instead of an object
        return orjson.dumps({"service": service, "ts": stamp, "metrics": list(metrics.values())})
    # a JSON document that is not an object
    return orjson.dumps([msg])


_BAD_KINDS = 6


# --------------------------------------------------------------------------- scenario


@dataclass(frozen=True)
class Scenario:
    """A generated demo scenario: services, incidents and a lazy stream of native messages.

    Build one with :func:`generate`. The messages are rendered on demand from ``seed`` (the one
    field beyond the description of the scenario itself); the incidents are applied while
    rendering, so ``dataclasses.replace(scn, incidents=())`` gives the same data without any
    incident. Construction validates the incidents (kind, service, metric, inside the period,
    one at a time per service) and raises :class:`ScenarioError` otherwise.

    Examples
    --------
    >>> scn = generate(days=3, services=3)
    >>> msgs = list(scn.messages())
    >>> {m["service"] for m in msgs} == set(scn.services)
    True
    >>> len(msgs) > 0.99 * 3 * 3 * 1440
    True
    """

    organisation: str
    services: tuple[str, ...]
    start: float
    end: float
    step_s: float
    incidents: tuple[Incident, ...]
    seed: int = 7

    def __post_init__(self) -> None:
        if isinstance(self.seed, bool) or not isinstance(self.seed, (int, np.integer)) or self.seed < 0:
            raise ScenarioError(f"seed must be a non-negative integer, got {self.seed!r}")
        if not (self.step_s >= _MIN_STEP_S and self.step_s <= _MAX_STEP_S):
            raise ScenarioError(f"step_s must be in [{_MIN_STEP_S}, {_MAX_STEP_S}] seconds, got {self.step_s}")
        if not self.end > self.start + self.step_s:
            raise ScenarioError("the scenario must span more than one step")
        if len(set(self.services)) != len(self.services) or not self.services:
            raise ScenarioError("services must be a non-empty tuple of distinct names")
        metrics = {name: _profile(self.seed, _service_index(name)).metrics for name in self.services}
        by_service: dict[str, list[Incident]] = {}
        for inc in self.incidents:
            if inc.kind not in INCIDENT_KINDS:
                raise ScenarioError(f"unknown incident kind {inc.kind!r}; known: {', '.join(INCIDENT_KINDS)}")
            if inc.service not in metrics:
                raise ScenarioError(f"incident on {inc.service!r}, which is not a service of this scenario")
            if inc.metric not in INCIDENT_METRICS[inc.kind] or inc.metric not in metrics[inc.service]:
                raise ScenarioError(f"a {inc.kind} cannot act on {inc.metric!r} of {inc.service}")
            if not (self.start < inc.start < inc.end <= self.end):
                raise ScenarioError(f"incident {inc.kind} on {inc.service} is not inside the scenario")
            by_service.setdefault(inc.service, []).append(inc)
        for name, incs in by_service.items():
            incs.sort(key=lambda i: i.start)
            for a, b in zip(incs, incs[1:]):
                if b.start < a.end:
                    raise ScenarioError(f"incidents overlap on {name}: {a.kind} and {b.kind}")

    def metric_names(self, service: str) -> tuple[str, ...]:
        """Metrics a service reports, in message order.

        >>> generate(days=3, services=2).metric_names("berth-planner")[-1]
        'queue_depth'
        """
        if service not in self.services:
            raise ScenarioError(f"{service!r} is not a service of this scenario")
        return _profile(self.seed, _service_index(service)).metrics

    def ts_form(self, service: str) -> str:
        """Which of :data:`TS_FORMS` a service's messages use.

        >>> [generate(days=3, services=3).ts_form(s) for s in ("ticket-api", "berth-planner", "fare-engine")]
        ['rfc3339', 'epoch_s', 'epoch_ms']
        """
        if service not in self.services:
            raise ScenarioError(f"{service!r} is not a service of this scenario")
        return _profile(self.seed, _service_index(service)).ts_form

    def messages(self) -> Iterator[dict]:
        """Native messages in arrival order: event-time order up to delivery jitter of < ``step_s``.

        Lazy: rendered block by block (a few hours of all services at a time).

        >>> it = generate(days=3, services=2).messages()
        >>> next(it)["labels"]["env"]
        'prod'
        """
        contexts = [_build_context(self, name) for name in self.services]
        return _stream(contexts, self.start, self.step_s, _n_steps(self.start, self.end, self.step_s))

    def write_jsonl(self, path: str | os.PathLike, *, bad_lines: int = 0) -> int:
        """Write the messages as JSON lines; returns the number of lines written.

        ``bad_lines > 0`` inserts that many deliberately malformed lines (cut-off JSON, no service,
        a string metric value, an unreadable ts, metrics as a list, a non-object document) at
        positions drawn from the seed.

        >>> import pathlib, tempfile
        >>> out = pathlib.Path(tempfile.mkdtemp()) / "demo.jsonl"
        >>> n = generate(days=3, services=2).write_jsonl(out, bad_lines=3)
        >>> n == len(out.read_bytes().splitlines())
        True
        """
        if isinstance(bad_lines, bool) or not isinstance(bad_lines, int) or bad_lines < 0:
            raise ScenarioError(f"bad_lines must be a non-negative integer, got {bad_lines!r}")
        rng = np.random.default_rng([self.seed, _S_BAD, bad_lines])
        # a bad line goes after message number `slot`; an upper bound on the message count is
        # enough here because slots past the end simply land at the end of the file
        n_max = len(self.services) * _n_steps(self.start, self.end, self.step_s)
        slots = np.sort(rng.integers(0, max(1, int(n_max * 0.98)), size=bad_lines)).tolist()
        kinds = [int(x) for x in rng.permutation(np.arange(bad_lines) % _BAD_KINDS)] if bad_lines else []
        written = 0
        pending = 0
        buf: list[bytes] = []
        dump = orjson.dumps
        last: dict | None = None
        with open(path, "wb") as fh:
            for i, msg in enumerate(self.messages()):
                while pending < bad_lines and slots[pending] <= i:
                    buf.append(_bad_line(kinds[pending], msg) + b"\n")
                    pending += 1
                buf.append(dump(msg, option=orjson.OPT_APPEND_NEWLINE))
                last = msg
                if len(buf) >= 8192:
                    fh.write(b"".join(buf))
                    written += len(buf)
                    buf.clear()
            while pending < bad_lines:
                if last is None:
                    raise ScenarioError("cannot write bad lines for a scenario without messages")
                buf.append(_bad_line(kinds[pending], last) + b"\n")
                pending += 1
            fh.write(b"".join(buf))
            written += len(buf)
        return written


# --------------------------------------------------------------------------- incident plan


def _human_duration(seconds: float) -> str:
    minutes = seconds / 60.0
    if minutes < 90:
        return f"{minutes:.0f} minutes"
    return f"{minutes / 60.0:.1f} hours"


def _describe(inc: Incident, value: float) -> str:
    svc, span = inc.service, _human_duration(inc.end - inc.start)
    if inc.kind == "latency_spike":
        return (f"A slow query plan after a statistics refresh pushes {svc} p95 latency to about "
                f"{value:.1f}x its usual level for {span}.")
    if inc.kind == "error_burst":
        return (f"An expired certificate on one backend makes about {100 * value:.0f}% of {svc} "
                f"requests fail for {span}.")
    if inc.kind == "traffic_drop":
        return (f"A misrouted balancer rule lets only about {100 * value:.0f}% of the usual traffic "
                f"reach {svc} for {span}.")
    if inc.kind == "memory_leak":
        return (f"A cache that never evicts grows {svc} memory by about {100 * value:.0f}% over "
                f"{span} until the process is restarted.")
    if inc.kind == "level_shift":
        words = _METRIC_WORDS[inc.metric]
        change = (f"by about {100 * value:.0f} percentage points" if inc.metric == "cpu_util"
                  else f"by about {100 * (value - 1):.0f}%")
        return f"A deploy of a new {svc} release raises its {words} {change}, and it stays at the new level."
    return (f"The {svc} exporter stops refreshing {_METRIC_WORDS[inc.metric]}, which repeats its "
            f"last value for {span}.")


def _draw_duration(kind: str, rng: np.random.Generator, step: float, usable: float) -> float:
    lo, hi = {
        "latency_spike": (20 * 60.0, 90 * 60.0),
        "error_burst": (15 * 60.0, 45 * 60.0),
        "traffic_drop": (30 * 60.0, 150 * 60.0),
        "memory_leak": (6 * 3600.0, min(14 * 3600.0, max(6 * 3600.0, 0.3 * usable))),
        "stuck_metric": (90 * 60.0, 6 * 3600.0),
    }[kind]
    return max(4, round(float(rng.uniform(lo, hi)) / step)) * step


def _overlaps(busy: list[tuple[float, float]], a: float, b: float) -> bool:
    return any(s < b and a < e for s, e in busy)


def _deploy_slots(start: float, lo: float, hi: float, step: float) -> np.ndarray:
    """Grid times in [lo, hi] that fall on weekday deploy hours."""
    if hi < lo:
        return np.zeros(0)
    t = _snap(lo, start, step) + step * np.arange(int((hi - lo) / step) + 1)
    t = t[(t >= lo) & (t <= hi)]
    h = _hour(t)
    return t[(_weekday(t) < 5) & (h >= _DEPLOY_HOURS[0]) & (h < _DEPLOY_HOURS[1])]


def _try_plan(rng: np.random.Generator, seed: int, profiles: list[_Profile], start: float, end: float,
              step: float, deploys: dict[str, np.ndarray], late: float) -> list[Incident] | None:
    """One attempt at a plan, or None if the draws painted it into a corner.

    ``late`` in [0, 1) is where level shifts may start, as a fraction of the usable period; later
    attempts use later onsets, which leaves room before them when there are few services.
    """
    usable0 = start + WARM_UP_S
    usable = end - usable0
    n_total = max(len(INCIDENT_KINDS), round(len(profiles) * usable / (5.5 * _DAY)))
    extra = rng.choice(len(_EXTRA_KINDS), size=n_total - len(INCIDENT_KINDS), p=_EXTRA_WEIGHTS)
    kinds = list(INCIDENT_KINDS) + [_EXTRA_KINDS[j] for j in extra.tolist()]
    # routine deploys are restarts; keep incidents away from them so each incident stands alone
    routine = {p.name: [(t - 1800.0, t + 1800.0) for t in deploys[p.name].tolist()] for p in profiles}
    busy = {p.name: list(routine[p.name]) for p in profiles}
    placed: list[tuple[str, str, str, float, float]] = []

    # Level shifts first: a deploy on weekday working hours in the later part of the period, with
    # at least half a day of data after it; it lasts to the end, so it is a service's last incident.
    n_shift = min(kinds.count("level_shift"), len(profiles))
    slots = _deploy_slots(start, usable0 + late * usable, end - _LEVEL_SHIFT_MIN_AFTER_S, step)
    if slots.size == 0:
        slots = _deploy_slots(start, usable0, end - _LEVEL_SHIFT_MIN_AFTER_S, step)
    if slots.size == 0:
        return None
    strata = np.array_split(slots, n_shift)
    for part in rng.permutation(len(strata)).tolist():
        pool = strata[part] if strata[part].size else slots
        onset = float(pool[rng.integers(pool.size)])
        # later routine deploys are fine: they restart the new release and leave the shift in place
        cands = [p for p in profiles
                 if not _overlaps(busy[p.name][len(routine[p.name]):], onset - _GAP_S, end)
                 and not _overlaps(routine[p.name], onset - _GAP_S, onset + _GAP_S)]
        if not cands:
            return None
        p = cands[int(rng.integers(len(cands)))]
        metric = INCIDENT_METRICS["level_shift"][int(rng.integers(3))]
        busy[p.name].append((onset, end))
        placed.append((p.name, metric, "level_shift", onset, end))

    # The rest: one stratum of the usable period each (in random order) so they spread out.
    others = [kinds[j] for j in rng.permutation(len(kinds)).tolist() if kinds[j] != "level_shift"]
    lo, hi = usable0, end - _END_MARGIN_S
    edges = np.linspace(lo, hi, len(others) + 1)
    for i, kind in enumerate(others):
        done = False
        for trial in range(60):
            dur = _draw_duration(kind, rng, step, usable)
            tail = _RECOVERY_S if kind == "memory_leak" else 0.0
            a, b = (edges[i], edges[i + 1]) if trial < 30 else (lo, hi)
            latest = min(b, hi - dur - tail)
            if latest < a:
                continue
            t0 = _snap(float(rng.uniform(a, latest)), start, step)
            if t0 < usable0:
                t0 += step
            metrics_ok = [p for p in profiles
                          if any(m in p.metrics for m in INCIDENT_METRICS[kind])]
            cands = [p for p in metrics_ok
                     if not _overlaps(busy[p.name], t0 - _GAP_S, t0 + dur + tail + _GAP_S)]
            if not cands:
                continue
            p = cands[int(rng.integers(len(cands)))]
            choices = [m for m in INCIDENT_METRICS[kind] if m in p.metrics]
            metric = choices[int(rng.integers(len(choices)))]
            busy[p.name].append((t0, t0 + dur + tail))
            placed.append((p.name, metric, kind, t0, t0 + dur))
            done = True
            break
        if not done:
            return None

    out = []
    for service, metric, kind, t0, t1 in sorted(placed, key=lambda x: (x[3], x[0])):
        draft = Incident(service, metric, kind, t0, t1, "")
        out.append(Incident(service, metric, kind, t0, t1, _describe(draft, _magnitude(seed, draft))))
    return out


def _plan(seed: int, profiles: list[_Profile], start: float, end: float, step: float) -> tuple[Incident, ...]:
    deploys = {p.name: _routine_deploys(seed, p, start, end, step) for p in profiles}
    for attempt in range(_PLAN_ATTEMPTS):
        late = 0.25 + 0.6 * attempt / (_PLAN_ATTEMPTS - 1)
        rng = np.random.default_rng([seed, _S_PLAN, attempt])
        plan = _try_plan(rng, seed, profiles, start, end, step, deploys, late)
        if plan is not None:
            return tuple(plan)
    raise ScenarioError(
        f"could not place the incidents on {len(profiles)} service(s) in {(end - start) / _DAY:g} days "
        "(one of each kind, after the warm-up, one at a time per service); use more days or services"
    )


def generate(seed: int = 7, days: float = 7.0, step_s: float = 60.0, services: int = 12) -> Scenario:
    """Generate the demo scenario.

    Parameters
    ----------
    seed
        Seed for every random draw (non-negative integer); same seed, same bytes.
    days
        Length of the scenario in days, from :data:`SCENARIO_START` (at least 3: 1.5 days of
        warm-up plus room for the incidents; a single service needs about 4 days or more, since
        its incidents must come one at a time).
    step_s
        Nominal scrape interval in seconds (1 to 600).
    services
        Number of services; the first 14 have their own names, more get replicas (``ticket-api-2``).

    Examples
    --------
    >>> scn = generate()
    >>> len(scn.services), scn.step_s, scn.end - scn.start == 7 * 86400
    (12, 60.0, True)
    >>> min(inc.start for inc in scn.incidents) >= scn.start + WARM_UP_S
    True
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ScenarioError(f"seed must be a non-negative integer, got {seed!r}")
    if isinstance(services, bool) or not isinstance(services, (int, np.integer)) or services < 1:
        raise ScenarioError(f"services must be a positive integer, got {services!r}")
    try:
        days, step_s = float(days), float(step_s)
    except (TypeError, ValueError) as exc:
        raise ScenarioError(f"days and step_s must be numbers: {exc}") from None
    if not (math.isfinite(days) and days >= _MIN_DAYS):
        raise ScenarioError(f"days must be at least {_MIN_DAYS} (1.5 days of warm-up plus incidents), got {days}")
    if not (_MIN_STEP_S <= step_s <= _MAX_STEP_S):
        raise ScenarioError(f"step_s must be in [{_MIN_STEP_S}, {_MAX_STEP_S}] seconds, got {step_s}")
    seed = int(seed)
    start = SCENARIO_START
    end = start + _n_steps(start, start + days * _DAY, step_s) * step_s  # whole steps only
    profiles = [_profile(seed, i) for i in range(int(services))]
    incidents = _plan(seed, profiles, start, end, step_s)
    return Scenario(
        organisation=ORGANISATION,
        services=tuple(p.name for p in profiles),
        start=start,
        end=end,
        step_s=step_s,
        incidents=incidents,
        seed=seed,
    )
