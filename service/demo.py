"""``tidewatch demo``: generate the demo scenario, score it, say what was caught.

Everything runs on the embedded default: the scenario is written as JSON lines,
replayed through the same runtime as ``tidewatch replay`` (with a few bad lines
mixed in to show the rejects sink), and the score messages are read back and
matched against the injected incidents.
"""

from __future__ import annotations

import sys
from pathlib import Path

from service.backtest import match_incidents, read_scores
from service.config import Config, load_config, parse_config
from service.embedded import replay
from service.scenario import generate
from service.timefmt import format_duration, format_rfc3339

__all__ = ["run_demo", "DEMO_CONFIG"]

# The demo's settings: five-minute windows over one-minute scrapes; everything else default.
DEMO_CONFIG = """
[defaults]
window = "5m"
lateness = "30s"
"""


def run_demo(*, seed: int = 7, days: float = 7.0, out_dir: str = "demo-output", config_path: str | None = None,
             out=sys.stdout) -> int:
    config: Config = load_config(config_path) if config_path else parse_config(DEMO_CONFIG, "<demo>")
    scenario = generate(seed=seed, days=days)
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    metrics_path = d / "metrics.jsonl"
    scores_path = d / "scores.jsonl"
    rejects_path = d / "rejects.jsonl"
    n = scenario.write_jsonl(metrics_path, bad_lines=12)
    summary = replay(config, str(metrics_path), str(scores_path), str(rejects_path))
    from service.labels import write_labels
    from service.report import write_report

    labels_path = d / "labels.csv"
    report_path = d / "report.html"
    write_labels(labels_path, scenario.incidents)
    write_report(report_path, scores_path, input_path=metrics_path, labels_path=labels_path)
    scores = read_scores(str(scores_path))
    window = config.defaults.window
    results, false_onsets = match_incidents(scores, scenario.incidents, window)

    p = lambda *a: print(*a, file=out)  # noqa: E731
    p(f"{scenario.organisation}: {len(scenario.services)} services, {days:g} days, {n} lines -> {metrics_path}")
    p(summary.describe())
    p(f"scores -> {scores_path}; rejects -> {rejects_path}; labels -> {labels_path}")
    p(f"report -> {report_path} (open it in a browser)")
    p("")
    p(f"{'incident':<15} {'service':<18} {'metric':<16} {'onset (UTC)':<21} {'caught':<7} {'delay':<7} named")
    for r in results:
        inc = r.incident
        delay = "-" if r.delay_windows is None else f"{r.delay_windows}w"
        p(
            f"{inc.kind:<15} {inc.service:<18} {inc.metric:<16} {format_rfc3339(inc.start):<21} "
            f"{'yes' if r.caught else 'NO':<7} {delay:<7} {'yes' if r.metric_named else 'no'}"
        )
    caught = sum(r.caught for r in results)
    weeks = days / 7.0
    p("")
    p(
        f"caught {caught}/{len(results)} incidents; {len(false_onsets)} alert onsets outside incidents "
        f"({len(false_onsets) / max(len(scenario.services) * weeks, 1e-9):.2f} per service-week); "
        f"window {format_duration(window)}, delay counted in windows (w) from onset"
    )
    for o in false_onsets[:10]:
        p(f"  false onset: {o.service} at {format_rfc3339(o.start)} (top metric {o.top_metric})")
    return 0
