"""Tests of the demo scenario generator (service/scenario.py).

Reference tools, named beside each check that uses them:
- pandas ``DataFrame.resample`` / ``groupby`` for hourly means and per-service grouping;
- ``numpy.corrcoef`` for Pearson correlation;
- Python's ``json`` module as an independent JSON reader, ``datetime.fromisoformat`` (which reads
  RFC 3339 date-times, including a trailing ``Z``, since Python 3.11 -- from memory of the Python
  docs; the tests would fail loudly if it did not) for timestamps.
Thresholds marked "scenario design" come from the magnitudes chosen in service/scenario.py
(``_magnitude``, the catalogue); they are this project's own numbers, with safety margins.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import functools
import hashlib
import itertools
import json
import math
import re
from collections.abc import Iterator

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.scenario import (
    INCIDENT_KINDS,
    INCIDENT_METRICS,
    ORGANISATION,
    SCENARIO_START,
    TS_FORMS,
    WARM_UP_S,
    Incident,
    Scenario,
    ScenarioError,
    generate,
)

DAY = 86400.0
HOUR = 3600.0
RECOVERY_S = 4 * HOUR  # memory warms back up within 4 h of a restart (scenario design)
SEEDS = (7, 8, 2026)
# RFC 3339 section 5.6 date-time (section number from memory), with milliseconds and "Z"
RFC3339_MS_Z = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}\.\d{3}Z$")
BASE_METRICS = ("latency_p95_ms", "errors", "requests", "cpu_util", "memory_mb", "restarts")


# --------------------------------------------------------------------------- helpers


def _epoch(ts: object) -> float:
    """Epoch seconds from any of the three ts forms."""
    if isinstance(ts, str):
        return dt.datetime.fromisoformat(ts).timestamp()  # Python docs: accepts RFC 3339 with Z
    if isinstance(ts, int):
        return ts / 1000.0
    if isinstance(ts, float):
        return ts
    raise TypeError(f"unexpected ts {ts!r}")


def _form(ts: object) -> str:
    if isinstance(ts, str):
        return "rfc3339"
    return "epoch_ms" if isinstance(ts, int) else "epoch_s"


def _frame(scn: Scenario) -> pd.DataFrame:
    rows = [
        {"order": i, "service": m["service"], "ts": _epoch(m["ts"]), "form": _form(m["ts"]),
         "region": m["labels"]["region"], "env": m["labels"]["env"], **m["metrics"]}
        for i, m in enumerate(scn.messages())
    ]
    return pd.DataFrame(rows)


@functools.lru_cache(maxsize=None)
def _scenario(seed: int) -> Scenario:
    return generate(seed)


@functools.lru_cache(maxsize=None)
def _data(seed: int) -> pd.DataFrame:
    return _frame(_scenario(seed))


@functools.lru_cache(maxsize=None)
def _baseline(seed: int) -> pd.DataFrame:
    """The same scenario with every incident removed (the counterfactual)."""
    return _frame(dataclasses.replace(_scenario(seed), incidents=()))


def _weekend(t: float) -> bool:
    return dt.datetime.fromtimestamp(t, dt.timezone.utc).weekday() >= 5


def _allowed(inc: Incident, scn: Scenario) -> list[tuple[str, float, float]]:
    """(metric, from, to) where ``inc`` may change the data; the counterfactual test checks that
    nothing else changes."""
    if inc.kind == "traffic_drop":  # latency, CPU, memory and queue follow the traffic
        coupled = ("requests", "errors", "latency_p95_ms", "cpu_util", "memory_mb", "queue_depth")
        return [(m, inc.start, inc.end) for m in coupled]
    if inc.kind == "memory_leak":
        return [("memory_mb", inc.start, inc.end + RECOVERY_S), ("restarts", inc.end, inc.end + scn.step_s)]
    if inc.kind == "level_shift":
        return [(inc.metric, inc.start, scn.end), ("memory_mb", inc.start, scn.end),
                ("restarts", inc.start, inc.start + scn.step_s)]
    return [(inc.metric, inc.start, inc.end)]


def _clean(scn: Scenario, service: str, metric: str, a: float, b: float) -> bool:
    """No incident of ``service`` acts on ``metric`` during [a, b)."""
    return not any(
        inc.service == service and m == metric and lo < b and a < hi
        for inc in scn.incidents
        for m, lo, hi in _allowed(inc, scn)
    )


def _like_windows(scn: Scenario, service: str, metrics: tuple[str, ...], a: float, b: float, *,
                  before: float | None = None) -> Iterator[tuple[float, float]]:
    """Windows of whole days away from [a, b), nearest first, that a person would compare against.

    Same hours, same weekday/weekend class at both ends, inside the scenario, with no incident
    of the service acting on any of ``metrics``, and (if ``before`` is given) ending before then.
    Comparing against the same hours of a like day is common practice for diurnal metrics.
    """
    for d in itertools.chain.from_iterable((-k, k) for k in range(1, 8)):
        ra, rb = a + d * DAY, b + d * DAY
        if ra < scn.start or rb > scn.end or (before is not None and rb > before):
            continue
        if _weekend(ra) != _weekend(a) or _weekend(rb - 1) != _weekend(b - 1):
            continue
        if all(_clean(scn, service, m, ra, rb) for m in metrics):
            yield ra, rb


def _rows(df: pd.DataFrame, service: str, a: float, b: float) -> pd.DataFrame:
    return df[(df.service == service) & (df.ts >= a) & (df.ts < b)]


def _like_hours(scn: Scenario, df: pd.DataFrame, inc: Incident, metrics: tuple[str, ...]) -> pd.DataFrame | None:
    """Rows from the same hours on like days, one calendar-day piece of the incident at a time.

    An incident that crosses midnight into a weekend has no single like day, but each of its
    pieces does; None if some piece has none.
    """
    parts = []
    a = inc.start
    while a < inc.end:
        b = min(inc.end, (math.floor(a / DAY) + 1) * DAY)
        window = next(_like_windows(scn, inc.service, metrics, a, b), None)
        if window is None:
            return None
        parts.append(_rows(df, inc.service, *window))
        a = b
    return pd.concat(parts)


def _incident_cases() -> list:
    cases = []
    for seed in SEEDS:
        for i, inc in enumerate(_scenario(seed).incidents):
            cases.append(pytest.param(seed, i, id=f"{seed}-{i}-{inc.kind}-{inc.service}"))
    return cases


def _line_problem(line: bytes) -> str | None:
    """Why a JSON line is not a valid native message (None if it is); independent of the code under test."""
    try:
        doc = json.loads(line)  # Python's json module as the independent reader
    except ValueError:
        return "not json"
    if not isinstance(doc, dict):
        return "not an object"
    if not isinstance(doc.get("service"), str) or not doc["service"]:
        return "no service"
    ts = doc.get("ts")
    if isinstance(ts, str):
        try:
            parsed = dt.datetime.fromisoformat(ts)
        except ValueError:
            return "bad ts"
        if parsed.tzinfo is None:
            return "bad ts"
    elif isinstance(ts, bool) or not isinstance(ts, (int, float)):
        return "bad ts"
    metrics = doc.get("metrics")
    if not isinstance(metrics, dict) or not metrics:
        return "metrics not an object"
    if any(isinstance(v, bool) or not isinstance(v, (int, float)) for v in metrics.values()):
        return "non-numeric metric"
    return None


# --------------------------------------------------------------------------- determinism


def test_same_seed_same_bytes_and_different_seed_differs(tmp_path):
    a, b, c = tmp_path / "a.jsonl", tmp_path / "b.jsonl", tmp_path / "c.jsonl"
    n_a = generate(7).write_jsonl(a, bad_lines=5)  # the default scenario, built twice
    n_b = generate(7).write_jsonl(b, bad_lines=5)
    digest = [hashlib.sha256(p.read_bytes()).hexdigest() for p in (a, b)]
    assert n_a == n_b and digest[0] == digest[1]
    small = [generate(seed, days=3, services=3) for seed in (7, 8)]
    small[0].write_jsonl(b)
    small[1].write_jsonl(c)
    assert b.read_bytes() != c.read_bytes()
    assert generate(7).incidents != generate(8).incidents


def test_messages_is_lazy_and_repeatable():
    scn = generate(days=3, services=3)
    it = scn.messages()
    assert isinstance(it, Iterator) and not isinstance(it, (list, tuple))
    assert list(itertools.islice(it, 50)) == list(itertools.islice(scn.messages(), 50))


# --------------------------------------------------------------------------- incident plan


def _check_plan(scn: Scenario) -> None:
    assert {inc.kind for inc in scn.incidents} == set(INCIDENT_KINDS)
    for inc in scn.incidents:
        assert isinstance(inc, Incident)
        assert inc.service in scn.services
        assert inc.metric in INCIDENT_METRICS[inc.kind] and inc.metric in scn.metric_names(inc.service)
        assert scn.start + WARM_UP_S <= inc.start < inc.end <= scn.end
        assert (inc.start - scn.start) % scn.step_s == 0 and (inc.end - scn.start) % scn.step_s == 0
        if inc.kind == "level_shift":
            assert inc.end == scn.end
        else:
            assert inc.end < scn.end
        assert inc.service in inc.description and inc.description.endswith(".")
        assert inc.description.count(". ") == 0  # one sentence
    for service in scn.services:
        mine = sorted((i for i in scn.incidents if i.service == service), key=lambda i: i.start)
        for x, y in zip(mine, mine[1:]):
            assert x.end <= y.start, f"{service}: {x.kind} overlaps {y.kind}"


@pytest.mark.parametrize("seed", SEEDS)
def test_default_plan(seed):
    scn = _scenario(seed)
    assert scn.organisation == ORGANISATION
    assert len(scn.services) == 12 and scn.step_s == 60.0 and scn.seed == seed
    assert scn.start == dt.datetime(2026, 3, 2, tzinfo=dt.timezone.utc).timestamp() == SCENARIO_START
    assert dt.datetime.fromtimestamp(scn.start, dt.timezone.utc).weekday() == 0  # a Monday
    assert scn.end - scn.start == 7 * DAY
    assert all(re.fullmatch(r"[a-z]+(-[a-z]+)+", s) for s in scn.services)
    _check_plan(scn)


@pytest.mark.parametrize("seed", SEEDS)
def test_incidents_spread_over_the_period(seed):
    scn = _scenario(seed)
    lo = scn.start + WARM_UP_S
    thirds = np.linspace(lo, scn.end, 4)
    starts = np.array([i.start for i in scn.incidents if i.kind != "level_shift"])
    counts = np.histogram(starts, bins=thirds)[0]
    assert (counts >= 1).all(), counts
    assert len(scn.incidents) >= len(scn.services) - 2  # about one incident per service per week


# Plans only (no rendering), so many random configurations are cheap; derandomised for CI and
# without an example database, so the run leaves no files behind.
@settings(max_examples=40, deadline=None, derandomize=True, database=None)
@given(seed=st.integers(0, 2**32 - 1), services=st.integers(3, 16), days=st.floats(4.0, 10.0))
def test_plan_invariants_hold_for_other_configurations(seed, services, days):
    _check_plan(generate(seed, days=days, services=services))


# --------------------------------------------------------------------------- incidents are visible


@pytest.mark.parametrize(("seed", "i"), _incident_cases())
def test_incident_is_visible(seed, i):
    scn, df = _scenario(seed), _data(seed)
    inc = scn.incidents[i]
    inside = _rows(df, inc.service, inc.start, inc.end)
    assert len(inside) >= 3
    x = inside[inc.metric].to_numpy(dtype=float)

    if inc.kind == "level_shift":
        # compare the hours after the deploy with the same hours of a like day before it
        length = min(12 * HOUR, scn.end - inc.start)
        while _weekend(inc.start + length - 1) != _weekend(inc.start):
            length -= HOUR
        ref = next(_like_windows(scn, inc.service, (inc.metric,), inc.start, inc.start + length,
                                 before=inc.start), None)
        assert ref is not None, "no comparable day before the shift"
        after = _rows(df, inc.service, inc.start, inc.start + length)[inc.metric].mean()
        before = _rows(df, inc.service, *ref)[inc.metric].mean()
        if inc.metric == "cpu_util":
            assert 0.07 <= after - before <= 0.3  # scenario design: +0.12..0.20
        else:
            assert 1.12 <= after / before <= 2.0  # scenario design: x1.2..1.6
        first = inside.sort_values("ts").iloc[0]
        assert first.ts < inc.start + scn.step_s and first.restarts == 1  # the deploy restarts it
        return

    if inc.kind == "memory_leak":
        pre = _rows(df, inc.service, inc.start - HOUR, inc.start)["memory_mb"].mean()
        tail = inside[inside.ts >= inc.end - 0.1 * (inc.end - inc.start)]["memory_mb"].mean()
        assert 1.3 <= tail / pre <= 2.0  # scenario design: grows 50-90% by the end
        # a ramp, not a step: memory rises steadily with time (numpy.corrcoef, Pearson r)
        assert np.corrcoef(inside.ts, x)[0, 1] > 0.9
        after = _rows(df, inc.service, inc.end, inc.end + HOUR).sort_values("ts")
        assert after.iloc[0].ts < inc.end + scn.step_s and after.iloc[0].restarts == 1
        assert abs(after["memory_mb"].mean() / pre - 1.0) < 0.15  # back to normal after the restart
        return

    if inc.kind == "stuck_metric":
        assert np.ptp(x) == 0.0 and inside[inc.metric].nunique() == 1  # frozen, noise gone
        last = _rows(df, inc.service, inc.start - scn.step_s, inc.start)[inc.metric]
        assert len(last) == 1 and last.iloc[0] == x[0]  # frozen at the last value reported
        normal = _rows(_baseline(seed), inc.service, inc.start, inc.end)[inc.metric]
        assert normal.nunique() > 1  # without the incident the metric does move
        return

    # 1) against the same hours of like days: what a person comparing plots would see. The
    #    like days may differ a little (wander, the weekend blend around midnight), hence margins.
    # errors are compared as a share of requests, so neither may be touched on the like day
    metrics = ("errors", "requests") if inc.kind == "error_burst" else (inc.metric,)
    y = _like_hours(scn, df, inc, metrics)
    assert y is not None, "no comparable day for this incident"
    # 2) against the same rows without the incident (the counterfactual): the injected size
    z = _rows(_baseline(seed), inc.service, inc.start, inc.end)
    if inc.kind == "latency_spike":
        assert 2.0 <= x.mean() / y["latency_p95_ms"].mean() <= 6.0  # scenario design: x2.5..4
        assert 2.2 <= x.mean() / z["latency_p95_ms"].mean() <= 4.5
    elif inc.kind == "error_burst":
        frac = inside["errors"].sum() / inside["requests"].sum()
        ref_frac = y["errors"].sum() / y["requests"].sum()
        assert 0.08 <= frac <= 0.4 and frac >= 5 * ref_frac  # scenario design: 12-30% fail
        assert inside["errors"].sum() >= 5 * max(1, z["errors"].sum())
    elif inc.kind == "traffic_drop":
        assert 0.1 <= x.mean() / y["requests"].mean() <= 0.7  # scenario design: 20-45% remains
        assert 0.12 <= x.mean() / z["requests"].mean() <= 0.52
    else:  # pragma: no cover - a new kind must get its own check
        pytest.fail(f"no visibility check for {inc.kind}")


@pytest.mark.parametrize("seed", SEEDS)
def test_incidents_change_only_their_service_metric_and_time(seed):
    scn, df, base = _scenario(seed), _data(seed), _baseline(seed)
    # pandas merge on (service, ts) as the reference join of the two runs
    both = df.merge(base, on=["service", "ts"], how="outer", suffixes=("", "_base"), indicator=True)
    # rows the incidents force to be reported (a restart, the last value before a freeze) may be
    # missing scrapes in the counterfactual; nothing else may appear or disappear
    extra = both[both["_merge"] != "both"]
    assert (extra["_merge"] == "left_only").all()
    assert len(extra) <= 2 * len(scn.incidents)
    both = both[both["_merge"] == "both"]
    for metric in ("latency_p95_ms", "errors", "requests", "cpu_util", "memory_mb", "restarts", "queue_depth"):
        a, b = both[metric].to_numpy(dtype=float), both[metric + "_base"].to_numpy(dtype=float)
        changed = ~((a == b) | (np.isnan(a) & np.isnan(b)))
        allowed = np.zeros(len(both), dtype=bool)
        for inc in scn.incidents:
            for m, lo, hi in _allowed(inc, scn):
                if m == metric:
                    allowed |= ((both.service == inc.service) & (both.ts >= lo) & (both.ts < hi)).to_numpy()
        stray = both[changed & ~allowed]
        assert stray.empty, f"{metric} changed outside incidents:\n{stray[['service', 'ts']].head()}"
    for inc in scn.incidents:  # and the incident does change its metric
        rows = both[(both.service == inc.service) & (both.ts >= inc.start) & (both.ts < inc.end)]
        share = (rows[inc.metric] != rows[inc.metric + "_base"]).mean()
        assert share > (0.3 if inc.kind == "stuck_metric" else 0.8), (inc.kind, share)


# --------------------------------------------------------------------------- the normal data


def _hourly(df: pd.DataFrame, metric: str) -> pd.DataFrame:
    # pandas groupby + resample("1h").mean() as the reference for hourly means
    idx = pd.to_datetime(df.ts, unit="s", utc=True)
    return df.set_index(idx).groupby("service")[metric].resample("1h").mean().unstack(level=0)


@pytest.mark.parametrize("seed", SEEDS)
def test_daily_cycle_repeats_from_day_to_day(seed):
    scn, df = _scenario(seed), _data(seed)
    hourly = _hourly(df, "requests")
    for service in scn.services:
        pairs = 0
        for d in range(int((scn.end - scn.start) / DAY) - 1):
            a, b = scn.start + d * DAY, scn.start + (d + 1) * DAY
            if _weekend(a) != _weekend(b):
                continue
            drops = [i for i in scn.incidents if i.service == service and i.kind == "traffic_drop"
                     and i.start < b + DAY and a < i.end]
            if drops:  # only traffic drops change requests (see the counterfactual test)
                continue
            day1 = hourly[service].iloc[d * 24 : d * 24 + 24].to_numpy()
            day2 = hourly[service].iloc[d * 24 + 24 : d * 24 + 48].to_numpy()
            r = np.corrcoef(day1, day2)[0, 1]  # numpy.corrcoef, Pearson r
            assert r > 0.8, (service, d, r)
            pairs += 1
        assert pairs >= 3, service


@pytest.mark.parametrize("seed", SEEDS)
def test_peak_hours_and_weekends_differ_between_services(seed):
    df = _baseline(seed)
    hourly = _hourly(df, "requests")
    weekday = hourly[hourly.index.day_of_week < 5]
    weekend = hourly[hourly.index.day_of_week >= 5]
    profile = weekday.groupby(weekday.index.hour).mean()  # mean weekday hour-of-day profile
    swing = profile.max() / profile.min()
    # a real cycle, not noise: vessel telemetry flows day and night, the rest swing much more
    assert (swing > 1.3).all() and (swing > 2.0).sum() >= len(swing) - 2, swing.to_dict()
    peaks = profile.idxmax()
    assert peaks.nunique() >= 6, peaks.to_dict()
    ratio = weekend.mean() / weekday.mean()
    assert (abs(ratio - 1.0) > 0.1).sum() >= 8, ratio.to_dict()
    assert (ratio > 1.05).any() and (ratio < 0.95).any()  # some busier at weekends, some quieter


@pytest.mark.parametrize("seed", SEEDS)
def test_latency_and_errors_follow_traffic_loosely(seed):
    df = _baseline(seed)
    req, lat, err = _hourly(df, "requests"), _hourly(df, "latency_p95_ms"), _hourly(df, "errors")
    for service in req.columns:
        r_lat = np.corrcoef(req[service], lat[service])[0, 1]  # numpy.corrcoef, Pearson r
        r_err = np.corrcoef(req[service], err[service])[0, 1]
        assert 0.3 < r_lat < 0.999 and 0.3 < r_err < 0.999, (service, r_lat, r_err)


def test_metric_values_are_plausible():
    scn, df = _scenario(7), _data(7)
    assert df["cpu_util"].between(0.0, 1.0).all()
    assert (df[["latency_p95_ms", "memory_mb"]] > 0).all().all()
    assert (df[["errors", "requests", "restarts"]] >= 0).all().all()
    assert (df["errors"] <= df["requests"]).all()
    assert (df["restarts"] == 0).mean() > 0.99
    assert df["restarts"].sum() >= len(scn.services)  # routine deploys restart services now and then
    with_queue = df.groupby("service")["queue_depth"].apply(lambda s: s.notna().all())
    without_queue = df.groupby("service")["queue_depth"].apply(lambda s: s.isna().all())
    assert (with_queue | without_queue).all() and with_queue.sum() >= 2 and without_queue.sum() >= 2
    assert df[list(BASE_METRICS)].notna().all().all()
    for service in scn.services:
        reported = set(df.loc[df.service == service].dropna(axis=1).columns)
        assert set(scn.metric_names(service)) <= reported
    assert (df["env"] == "prod").all() and 1 < df["region"].nunique() <= 4


# --------------------------------------------------------------------------- timestamps and order


def test_all_ts_forms_appear_one_per_service():
    scn = _scenario(7)
    forms: dict[str, set[str]] = {}
    for m in scn.messages():
        forms.setdefault(m["service"], set()).add(_form(m["ts"]))
        if isinstance(m["ts"], str):
            assert RFC3339_MS_Z.match(m["ts"]), m["ts"]
    assert all(len(f) == 1 for f in forms.values())
    assert {f for fs in forms.values() for f in fs} == set(TS_FORMS)
    assert all(scn.ts_form(s) in forms[s] for s in scn.services)
    rfc = sum(1 for fs in forms.values() if "rfc3339" in fs)
    assert rfc > len(scn.services) / 2  # most services use RFC 3339
    # all three forms count the same clock: every ts lies inside its scrape step
    df = _data(7)
    assert df.ts.between(scn.start, scn.end, inclusive="left").all()
    offset = ((df.ts - scn.start) % scn.step_s) / scn.step_s
    assert offset.between(0.05, 0.95).all()
    assert (df.groupby("form").ts.count() > 5000).all()


def test_order_is_event_time_up_to_jitter_below_one_step():
    scn, df = _scenario(7), _data(7)
    ts = df.sort_values("order").ts.to_numpy()
    lag = np.maximum.accumulate(ts) - ts
    assert lag.max() < scn.step_s
    assert (lag > 0).any()  # some messages do arrive out of order, to exercise reordering


def test_scrapes_jitter_and_some_go_missing():
    scn, df = _scenario(7), _data(7)
    n_steps = int((scn.end - scn.start) / scn.step_s)
    phases = []
    for service, rows in df.groupby("service"):
        ts = np.sort(rows.ts.to_numpy())
        offset = (ts - scn.start) % scn.step_s
        assert offset.std() > 0.1  # jitter around the service's scrape second
        assert len(np.unique(np.floor((ts - scn.start) / scn.step_s))) == len(ts)  # one per step
        gaps = np.diff(ts)
        assert gaps.max() > 1.5 * scn.step_s  # at least one missing scrape
        phases.append(np.median(offset))
    missing = 1.0 - len(df) / (n_steps * len(scn.services))
    assert 0.0005 < missing < 0.02
    assert len(np.unique(np.round(phases))) >= 6  # services scrape at different seconds


# --------------------------------------------------------------------------- JSON lines


def test_write_jsonl_with_bad_lines(tmp_path):
    scn = generate(7, days=3, services=6)
    path = tmp_path / "demo.jsonl"
    n = scn.write_jsonl(path, bad_lines=12)
    lines = path.read_bytes().splitlines()
    assert n == len(lines)
    problems = [_line_problem(line) for line in lines]
    bad = [i for i, p in enumerate(problems) if p is not None]
    assert len(bad) == 12
    assert {problems[i] for i in bad} == {"not json", "not an object", "no service", "bad ts",
                                          "metrics not an object", "non-numeric metric"}
    assert bad[0] < len(lines) // 2 < bad[-1]  # sprinkled, not piled at one end
    good = [json.loads(line) for i, line in enumerate(lines) if problems[i] is None]
    assert good == [json.loads(json.dumps(m)) for m in scn.messages()]


def test_write_jsonl_without_bad_lines(tmp_path):
    scn = generate(days=3, services=3)
    path = tmp_path / "clean.jsonl"
    n = scn.write_jsonl(path)
    lines = path.read_bytes().splitlines()
    assert n == len(lines) == sum(1 for _ in scn.messages())
    assert all(_line_problem(line) is None for line in lines)


# --------------------------------------------------------------------------- refusals


@pytest.mark.parametrize(
    "kwargs",
    [dict(days=1.0), dict(days=float("nan")), dict(step_s=0.0), dict(step_s=7200.0), dict(services=0),
     dict(seed=-1), dict(seed=1.5), dict(services=1, days=3.0)],
)
def test_generate_refuses_bad_parameters(kwargs):
    with pytest.raises(ScenarioError):
        generate(**kwargs)


def test_scenario_refuses_bad_incidents_and_bad_lines_count(tmp_path):
    scn = generate(days=3, services=3)
    inc = scn.incidents[0]
    bad_cases = [
        dataclasses.replace(inc, kind="meteor_strike"),
        dataclasses.replace(inc, service="not-a-service"),
        dataclasses.replace(inc, kind="memory_leak", metric="errors"),
        dataclasses.replace(inc, start=scn.start - 60.0),
    ]
    for bad in bad_cases:
        with pytest.raises(ScenarioError):
            dataclasses.replace(scn, incidents=(bad,))
    with pytest.raises(ScenarioError):  # two at a time on one service
        dataclasses.replace(scn, incidents=(inc, dataclasses.replace(inc, start=inc.start + 60.0)))
    with pytest.raises(ScenarioError):
        scn.write_jsonl(tmp_path / "x.jsonl", bad_lines=-1)
    with pytest.raises(ScenarioError):
        scn.metric_names("not-a-service")
