"""The score message: one JSON object per closed (service, window).

The JSON Schema is committed as ``config/score-message.schema.json``; bump
:data:`SCORE_SCHEMA_VERSION` on any incompatible change.
"""

from __future__ import annotations

import orjson

from models.base import PURE_PYTHON
from service.timefmt import format_rfc3339

__all__ = ["SCORE_SCHEMA_VERSION", "C_ENCODER", "encode_score"]

SCORE_SCHEMA_VERSION = 1
_dumps = orjson.dumps

# Numbers on which the C encoder's float layout must agree with the installed orjson's before it is used
# (the layout is orjson's own choice, which a new release could change): every decimal exponent a message can
# hold, both signs, zeros, and round(x, 6) halfway cases.
_PROBES = tuple(
    [0.0, -0.0, 0.5, 0.99, 1.0, 1234567.5, 1.7976931348623157e308, 5e-324, 0.1 + 0.2, 2.0000005, 0.1234565]
    + [m * 10.0 ** e for e in range(-12, 25) for m in (1.0, 1.25, 9.87654321, -3.0000001)]
)


def _agrees(encoder) -> bool:
    for x in _PROBES:
        if encoder.number(x) != _dumps(x) or encoder.rounded(x) != round(x, 6) \
                or encoder.rounded_number(x) != _dumps(round(x, 6)):
            return False
    return True


try:
    # The message written in C (service/_scoremsg.c): the same bytes as the dict below through orjson, for the
    # common case (plain ASCII names, finite numbers); it returns None for the rest, which the Python form
    # writes. Not used with TIDEWATCH_PURE_PYTHON=1, or where its float layout differs from the installed orjson's.
    from service import _scoremsg
except ImportError:  # pragma: no cover - depends on the install
    _scoremsg = None
_c_encode = _scoremsg.encode if _scoremsg is not None and not PURE_PYTHON and _agrees(_scoremsg) else None

#: Whether score messages are written by the C encoder.
C_ENCODER = _c_encode is not None


def encode_score(service: str, start: float, end: float, count: int, kind: str, threshold: float, assessment) -> bytes:
    """Encode one score message (UTF-8 JSON, no trailing newline).

    ``assessment`` is a :class:`models.Assessment`.
    """
    if _c_encode is not None:
        out = _c_encode(SCORE_SCHEMA_VERSION, service, format_rfc3339(start), format_rfc3339(end), count, kind,
                        threshold, assessment)
        if out is not None:
            return out
    # Numbers are rounded to six decimals (``round(float(x), 6)``), which keeps messages short and
    # stable across platforms; written out at each use rather than called, once per number per window.
    contributors = [
        {
            "feature": (feature := c.feature),
            "metric": feature.rpartition(".")[0] or feature,
            "observed": round(float(c.observed), 6),
            "expected": round(float(c.expected), 6),
            "deviation": round(float(c.deviation), 6),
        }
        for c in assessment.contributors
    ]
    return _dumps(
        {
            "schema_version": SCORE_SCHEMA_VERSION,
            "service": service,
            "window_start": format_rfc3339(start),
            "window_end": format_rfc3339(end),
            "score": round(float(assessment.score), 6),
            "anomalous": bool(assessment.anomalous),
            "threshold": threshold,
            "warming_up": bool(assessment.warming_up),
            "model": kind,
            "count": count,
            "raw_score": round(float(assessment.raw), 6),
            "contributors": contributors,
        }
    )
