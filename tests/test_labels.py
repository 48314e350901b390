"""The labels file: parsing, the errors people see, and writing the demo scenario's incidents."""

from __future__ import annotations

import doctest
from datetime import datetime, timezone

import pytest

import service.labels
from service.backtest import match_incidents
from service.labels import COLUMNS, Label, LabelsError, format_labels, labels_from_incidents, parse_labels, read_labels, write_labels
from service.scenario import generate


def _utc(*args: int) -> float:
    return datetime(*args, tzinfo=timezone.utc).timestamp()


def test_docstring_examples_run() -> None:
    result = doctest.testmod(service.labels, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0 and result.attempted > 0


def test_parses_columns_in_any_order_with_comments_quotes_and_offsets() -> None:
    text = (
        "# incidents reviewed on Friday\n"
        "\n"
        "end,service,note,start,kind,metric\n"
        "2026-03-03T14:40:00Z,ticket-api,\"slow query, reverted\",2026-03-03T14:00:00Z,latency_spike,latency_p95_ms\n"
        "# the next one was written in local time (UTC+1)\n"
        "2026-03-04T03:00:00+01:00,berth-planner,,2026-03-04T02:10:00+01:00,,\n"
    )
    a, b = parse_labels(text)
    assert a == Label("ticket-api", _utc(2026, 3, 3, 14, 0), _utc(2026, 3, 3, 14, 40), "latency_p95_ms",
                      "latency_spike", "slow query, reverted")
    # 02:10 at UTC+1 is 01:10 UTC; empty optional fields become None
    assert b == Label("berth-planner", _utc(2026, 3, 4, 1, 10), _utc(2026, 3, 4, 2, 0))


def test_only_the_required_columns_are_needed() -> None:
    [lab] = parse_labels("service,start,end\napi,2026-03-02T10:00:00Z,2026-03-02T10:30:00.5Z\n")
    assert (lab.metric, lab.kind, lab.note) == (None, None, None)
    assert lab.duration == 1800.5


@pytest.mark.parametrize("text", ["2026-03-02t10:00:00z", "2026-03-02 10:00:00Z", "2026-03-02T10:00:00.000+00:00"])
def test_accepts_the_rfc3339_spellings(text: str) -> None:
    # RFC 3339 section 5.6 (from memory): "T" and "Z" may be lower case, and a space may separate
    # date and time; fractional seconds are optional
    [lab] = parse_labels(f"service,start,end\napi,{text},2026-03-02T11:00:00Z\n")
    assert lab.start == _utc(2026, 3, 2, 10, 0)


@pytest.mark.parametrize(
    ("row", "field", "words"),
    [
        ("api,2026-03-02T10:00:00,2026-03-02T11:00:00Z", "start", "no UTC offset"),
        ("api,2026-03-02T10:00:00Z,yesterday", "end", "not an RFC 3339 timestamp"),
        ("api,2026-03-02T10:00:00Z,2026-03-02T10:00:00Z", "end", "not after start"),
        ("api,2026-03-02T12:00:00Z,2026-03-02T11:00:00Z", "end", "not after start"),
        ("api,2026-02-30T10:00:00Z,2026-03-02T11:00:00Z", "start", "not a valid time"),
        ("api,1772445600,2026-03-02T11:00:00Z", "start", "not an RFC 3339 timestamp"),
        (",2026-03-02T10:00:00Z,2026-03-02T11:00:00Z", "service", "service name is required"),
    ],
)
def test_bad_fields_name_the_line_and_the_field(row: str, field: str, words: str) -> None:
    text = "# comment\nservice,start,end\n\n" + row + "\n"
    with pytest.raises(LabelsError) as info:
        parse_labels(text, source="labels.csv")
    exc = info.value
    assert (exc.line, exc.field, exc.source) == (4, field, "labels.csv")  # physical line: comments and blanks count
    assert words in str(exc) and str(exc).startswith(f"labels.csv line 4, field '{field}': ")


@pytest.mark.parametrize(
    ("text", "line", "words"),
    [
        ("service,start,end,severity\n", 1, "unknown column 'severity'"),
        ("service,start,end,start\n", 1, "column 'start' appears twice"),
        ("service,start,metric\n", 1, "lacks the required column(s) end"),
        ("service,start,end\napi,2026-03-02T10:00:00Z\n", 2, "2 fields, but the header has 3"),
        ("service,start,end\napi,2026-03-02T10:00:00Z,2026-03-02T11:00:00Z,extra\n", 2, "4 fields"),
        ('service,start,end,note\napi,2026-03-02T10:00:00Z,2026-03-02T11:00:00Z,"never closed\n', 2, "not valid CSV"),
    ],
)
def test_bad_lines_name_the_line(text: str, line: int, words: str) -> None:
    with pytest.raises(LabelsError) as info:
        parse_labels(text)
    assert info.value.line == line and info.value.field is None
    assert words in str(info.value)


def test_an_empty_file_has_no_labels() -> None:
    assert parse_labels("") == []
    assert parse_labels("# nothing happened this week\n\n") == []


def test_read_labels_reports_unreadable_files(tmp_path) -> None:
    with pytest.raises(LabelsError, match="cannot read the file"):
        read_labels(tmp_path / "missing.csv")
    p = tmp_path / "latin1.csv"
    p.write_bytes(b"service,start,end,note\napi,2026-03-02T10:00:00Z,2026-03-02T11:00:00Z,caf\xe9\n")
    with pytest.raises(LabelsError, match="not UTF-8"):
        read_labels(p)


def test_a_label_error_is_a_value_error() -> None:
    # callers that only know ValueError (argparse type= functions) still catch it
    with pytest.raises(ValueError):
        parse_labels("nope\n")


def test_scenario_incidents_round_trip_through_the_file(tmp_path) -> None:
    scn = generate(days=3, services=4)
    path = tmp_path / "labels.csv"
    assert write_labels(path, scn.incidents) == len(scn.incidents) >= 6
    text = path.read_text()
    assert text.splitlines()[0] == ",".join(COLUMNS)
    back = read_labels(path)
    # the scenario's times are whole seconds, so they survive RFC 3339 text exactly
    assert [(b.service, b.start, b.end, b.metric, b.kind, b.note) for b in back] == [
        (i.service, i.start, i.end, i.metric, i.kind, i.description) for i in scn.incidents
    ]
    assert back == labels_from_incidents(scn.incidents)


def test_notes_are_kept_on_one_line() -> None:
    text = format_labels([Label("api", 1772445600.0, 1772449200.0, note="first line\nsecond,  line")])
    assert text.count("\n") == 2
    assert parse_labels(text)[0].note == "first line second, line"


def test_format_refuses_non_finite_times() -> None:
    with pytest.raises(LabelsError, match="not finite"):
        format_labels([Label("api", float("nan"), 1772449200.0)])


def test_labels_stand_in_for_incidents_when_matching() -> None:
    # a flagged window inside the labelled period catches it, exactly as for the scenario's Incident
    t0 = _utc(2026, 3, 2, 10, 0)
    scores = [
        {"service": "api", "window_start": datetime.fromtimestamp(t0 + 300 * k, timezone.utc).isoformat(),
         "anomalous": k == 3, "contributors": [{"metric": "errors"}]}
        for k in range(8)
    ]
    [lab] = parse_labels("service,start,end,metric\napi,2026-03-02T10:10:00Z,2026-03-02T10:30:00Z,errors\n")
    [res], false = match_incidents(scores, [lab], 300.0)
    assert res.caught and res.delay_windows == 1 and res.metric_named and false == []
