"""The score message: one JSON object per closed (service, window).

The JSON Schema is committed as ``config/score-message.schema.json``; bump
:data:`SCORE_SCHEMA_VERSION` on any incompatible change.
"""

from __future__ import annotations

import orjson

from service.timefmt import format_rfc3339

__all__ = ["SCORE_SCHEMA_VERSION", "encode_score"]

SCORE_SCHEMA_VERSION = 1
_dumps = orjson.dumps


def encode_score(service: str, start: float, end: float, count: int, kind: str, threshold: float, assessment) -> bytes:
    """Encode one score message (UTF-8 JSON, no trailing newline).

    ``assessment`` is a :class:`models.Assessment`.
    """
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
