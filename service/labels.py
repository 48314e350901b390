"""Labelled incidents for backtests: a small CSV format, its parser and its writer.

A labels file says when a person knows a service misbehaved, so a backtest can
show which of those periods the scores flagged, how soon, and which flags fell
outside every labelled period. Format (UTF-8 CSV, RFC 4180 quoting)::

    # lines starting with '#' are comments; blank lines are ignored
    service,start,end,metric,kind,note
    ticket-api,2026-03-03T14:00:00Z,2026-03-03T14:40:00Z,latency_p95_ms,latency_spike,"slow query, reverted"
    berth-planner,2026-03-04T02:10:00+01:00,2026-03-04T03:00:00+01:00,,,

* The first non-comment line is the header. ``service``, ``start`` and ``end`` are
  required; ``metric``, ``kind`` and ``note`` are optional columns and may be empty.
  Columns may come in any order; unknown or repeated column names are errors.
* ``start`` and ``end`` are RFC 3339 timestamps *with* a UTC offset (``Z`` or
  ``+01:00``): a label is written by a person, and a time without an offset is
  ambiguous about which clock they read. ``start`` is included, ``end`` excluded,
  and ``end`` must be after ``start``.
* ``metric`` names the metric the incident showed in (the report checks whether the
  first flagged window named it among its top contributors); ``kind`` is free text
  such as ``latency_spike``; ``note`` is free text for the reader.

Every error names the file, the line and the field.

Examples
--------
>>> text = '''service,start,end,metric
... ticket-api,2026-03-03T14:00:00Z,2026-03-03T14:40:00Z,latency_p95_ms
... '''
>>> [lab] = parse_labels(text)
>>> lab.service, lab.end - lab.start, lab.metric, lab.kind
('ticket-api', 2400.0, 'latency_p95_ms', None)
>>> try:
...     parse_labels("service,start,end\\nticket-api,2026-03-03T14:00:00,2026-03-03T15:00:00Z\\n", source="x.csv")
... except LabelsError as exc:
...     print(exc)
x.csv line 2, field 'start': '2026-03-03T14:00:00' has no UTC offset; write it with Z or +hh:mm, e.g. 2026-03-03T14:00:00Z
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime

from service.errors import TidewatchError
from service.timefmt import format_rfc3339

__all__ = [
    "COLUMNS",
    "REQUIRED_COLUMNS",
    "Label",
    "LabelsError",
    "format_labels",
    "labels_from_incidents",
    "parse_labels",
    "read_labels",
    "write_labels",
]

#: Every column a labels file may have, in the order :func:`format_labels` writes them.
COLUMNS = ("service", "start", "end", "metric", "kind", "note")
REQUIRED_COLUMNS = ("service", "start", "end")

# RFC 3339 section 5.6: full-date "T" full-time, where time-offset is "Z" or +/-hh:mm.
# Python's fromisoformat is laxer (it accepts no offset, week dates, "+0100"); the
# shape is checked first so that a label means the same thing to every reader.
_RFC3339 = re.compile(
    r"^\d{4}-\d{2}-\d{2}[Tt ]\d{2}:\d{2}:\d{2}(\.\d{1,9})?(?P<offset>[Zz]|[+-]\d{2}:\d{2})?$"
)


class LabelsError(TidewatchError, ValueError):
    """A labels file cannot be read or has a bad line (a ``ValueError`` too).

    ``source``, ``line`` (1-based, or None for the whole file) and ``field`` (or None)
    say where.
    """

    def __init__(self, message: str, *, source: str = "<labels>", line: int | None = None,
                 field: str | None = None) -> None:
        where = source if line is None else f"{source} line {line}"
        if field is not None:
            where += f", field {field!r}"
        super().__init__(f"{where}: {message}")
        self.source = source
        self.line = line
        self.field = field


@dataclass(frozen=True, slots=True)
class Label:
    """One labelled incident: ``service`` misbehaved from ``start`` (included) to ``end`` (excluded).

    Times are epoch seconds, UTC. It has the attributes :func:`service.backtest.match_incidents`
    reads (``service``, ``start``, ``end``, ``metric``, ``kind``), so labels and the demo
    scenario's incidents are interchangeable there.

    >>> Label("ticket-api", 1772560800.0, 1772563200.0).duration
    2400.0
    """

    service: str
    start: float
    end: float
    metric: str | None = None
    kind: str | None = None
    note: str | None = None

    @property
    def duration(self) -> float:
        return self.end - self.start


def _parse_time(text: str, *, source: str, line: int, field: str) -> float:
    m = _RFC3339.match(text)
    if m is None:
        raise LabelsError(f"{text!r} is not an RFC 3339 timestamp such as 2026-03-03T14:00:00Z",
                          source=source, line=line, field=field)
    if m["offset"] is None:
        raise LabelsError(f"{text!r} has no UTC offset; write it with Z or +hh:mm, e.g. {text}Z",
                          source=source, line=line, field=field)
    try:
        # fromisoformat (3.11) takes 'Z' but not the lower-case 'z' that RFC 3339 allows
        return datetime.fromisoformat(text[:-1] + "Z" if text.endswith("z") else text).timestamp()
    except ValueError as exc:  # e.g. month 13, hour 25
        raise LabelsError(f"{text!r} is not a valid time: {exc}", source=source, line=line, field=field) from None


def parse_labels(data: str | Iterable[str], *, source: str = "<labels>") -> list[Label]:
    """Parse labels from CSV text (or an iterable of lines); see the module docstring.

    Returns the labels in file order. Raises :class:`LabelsError` naming the line and
    field of the first problem.

    >>> parse_labels("# none yet\\nservice,end,start\\n")
    []
    >>> parse_labels("service,start,end,severity\\n")
    Traceback (most recent call last):
    ...
    service.labels.LabelsError: <labels> line 1: unknown column 'severity'; the columns are service, start, end, metric, kind, note
    """
    lines = io.StringIO(data) if isinstance(data, str) else iter(data)
    # Comments and blank lines are dropped before the CSV reader sees them, but the
    # physical line numbers are kept so that errors point at the right line.
    kept: list[tuple[int, str]] = []
    for number, text in enumerate(lines, start=1):
        stripped = text.strip()
        if not stripped or stripped.startswith("#"):
            continue
        kept.append((number, text if text.endswith("\n") else text + "\n"))
    numbers = [n for n, _ in kept]
    reader = csv.reader((t for _, t in kept), strict=True)
    header: list[str] | None = None
    out: list[Label] = []
    while True:
        row_index = reader.line_num  # physical lines the reader consumed so far (of the kept ones)
        try:
            row = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            line = numbers[min(reader.line_num, len(numbers)) - 1] if numbers else None
            raise LabelsError(f"not valid CSV: {exc}", source=source, line=line) from None
        line = numbers[row_index]
        if header is None:
            header = [c.strip().lower() for c in row]
            for col in header:
                if col not in COLUMNS:
                    raise LabelsError(f"unknown column {col!r}; the columns are {', '.join(COLUMNS)}",
                                      source=source, line=line)
                if header.count(col) > 1:
                    raise LabelsError(f"column {col!r} appears twice", source=source, line=line)
            missing = [c for c in REQUIRED_COLUMNS if c not in header]
            if missing:
                raise LabelsError(
                    f"the header lacks the required column(s) {', '.join(missing)}; "
                    f"it must name at least {', '.join(REQUIRED_COLUMNS)}",
                    source=source, line=line,
                )
            continue
        if len(row) != len(header):
            raise LabelsError(f"{len(row)} fields, but the header has {len(header)} ({', '.join(header)})",
                              source=source, line=line)
        rec = {col: value.strip() for col, value in zip(header, row)}
        service = rec["service"]
        if not service or not service.isprintable():
            raise LabelsError("a service name is required (non-empty, printable)", source=source, line=line,
                              field="service")
        start = _parse_time(rec["start"], source=source, line=line, field="start")
        end = _parse_time(rec["end"], source=source, line=line, field="end")
        if not end > start:
            raise LabelsError(f"end {rec['end']} is not after start {rec['start']}", source=source, line=line,
                              field="end")
        out.append(Label(service, start, end, rec.get("metric") or None, rec.get("kind") or None,
                         rec.get("note") or None))
    return out


def read_labels(path: str | os.PathLike) -> list[Label]:
    """Read a labels file; see :func:`parse_labels`.

    >>> import pathlib, tempfile
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "labels.csv"
    >>> _ = p.write_text("service,start,end\\napi,2026-03-02T10:00:00Z,2026-03-02T11:00:00Z\\n")
    >>> read_labels(p)[0].service
    'api'
    """
    try:
        with open(path, encoding="utf-8", newline="") as fh:
            return parse_labels(fh, source=os.fspath(path))
    except UnicodeDecodeError as exc:
        raise LabelsError(f"not UTF-8 text: {exc}", source=os.fspath(path)) from None
    except OSError as exc:
        raise LabelsError(f"cannot read the file: {exc.strerror or exc}", source=os.fspath(path)) from None


def _time_text(ts: float) -> str:
    if not math.isfinite(ts):
        raise LabelsError(f"time {ts!r} is not finite")
    return format_rfc3339(float(ts))


def format_labels(items: Iterable[object]) -> str:
    """Render labels (or anything with ``service``, ``start``, ``end`` and optionally
    ``metric``, ``kind`` and ``note`` or ``description``) as labels-file text.

    The demo scenario's :class:`~service.scenario.Incident` has ``description`` rather
    than ``note``; it becomes the note.

    >>> print(format_labels([Label("api", 1772445600.0, 1772449200.0, kind="error_burst", note="a, b")]), end="")
    service,start,end,metric,kind,note
    api,2026-03-02T10:00:00Z,2026-03-02T11:00:00Z,,error_burst,"a, b"
    """
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COLUMNS)
    for item in items:
        note = getattr(item, "note", None)
        if note is None:
            note = getattr(item, "description", None)
        w.writerow([
            item.service,  # type: ignore[attr-defined]
            _time_text(item.start),  # type: ignore[attr-defined]
            _time_text(item.end),  # type: ignore[attr-defined]
            getattr(item, "metric", None) or "",
            getattr(item, "kind", None) or "",
            # one record per line keeps the file readable and diffable
            " ".join(str(note).split()) if note else "",
        ])
    return buf.getvalue()


def labels_from_incidents(incidents: Iterable[object]) -> list[Label]:
    """Turn the demo scenario's incidents into labels (``description`` becomes ``note``).

    >>> from service.scenario import generate
    >>> labs = labels_from_incidents(generate(days=3, services=4).incidents)
    >>> len(labs) >= 6 and all(lab.end > lab.start for lab in labs)
    True
    """
    return [
        Label(i.service, float(i.start), float(i.end), getattr(i, "metric", None), getattr(i, "kind", None),  # type: ignore[attr-defined]
              getattr(i, "note", None) or getattr(i, "description", None))
        for i in incidents
    ]


def write_labels(path: str | os.PathLike, items: Iterable[object]) -> int:
    """Write labels (or incidents) to ``path`` in the labels format; returns how many.

    >>> import pathlib, tempfile
    >>> from service.scenario import generate
    >>> scn = generate(days=3, services=4)
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "labels.csv"
    >>> write_labels(p, scn.incidents) == len(scn.incidents)
    True
    >>> [(lab.service, lab.start) for lab in read_labels(p)] == [(i.service, i.start) for i in scn.incidents]
    True
    """
    items = list(items)
    text = format_labels(items)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(text)
    return len(items)
