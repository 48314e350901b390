"""The score message: one JSON object per closed (service, window).

The JSON Schema is committed as ``config/score-message.schema.json``; bump
:data:`SCORE_SCHEMA_VERSION` on any incompatible change.
"""

from __future__ import annotations

import orjson

from service.timefmt import format_rfc3339

__all__ = ["SCORE_SCHEMA_VERSION", "encode_score"]

SCORE_SCHEMA_VERSION = 1


def _round(x: float) -> float:
    # Six significant decimals keep messages short and stable across platforms.
    return round(float(x), 6)


def encode_score(service: str, start: float, end: float, count: int, kind: str, threshold: float, assessment) -> bytes:
    """Encode one score message (UTF-8 JSON, no trailing newline).

    ``assessment`` is a :class:`models.Assessment`.
    """
    contributors = [
        {
            "feature": c.feature,
            "metric": c.feature.rpartition(".")[0] or c.feature,
            "observed": _round(c.observed),
            "expected": _round(c.expected),
            "deviation": _round(c.deviation),
        }
        for c in assessment.contributors
    ]
    return orjson.dumps(
        {
            "schema_version": SCORE_SCHEMA_VERSION,
            "service": service,
            "window_start": format_rfc3339(start),
            "window_end": format_rfc3339(end),
            "score": _round(assessment.score),
            "anomalous": bool(assessment.anomalous),
            "threshold": threshold,
            "warming_up": bool(assessment.warming_up),
            "model": kind,
            "count": count,
            "raw_score": _round(assessment.raw),
            "contributors": contributors,
        }
    )
