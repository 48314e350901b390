"""The small scorer protocol every model component follows, and shared input handling.

Components learn from and score one window at a time, with a plain ``dict`` of feature name to
value, and a higher score means more unusual (the convention of river's anomaly detectors).

Examples
--------
>>> from models.base import Scorer, split_features
>>> from models.baseline import AdaptiveBaseline
>>> isinstance(AdaptiveBaseline(), Scorer)
True
>>> names, values = split_features({"b": 2, "a": float("nan"), "c": 0.5})
>>> names, values
(['b', 'c'], [2.0, 0.5])
"""

from __future__ import annotations

import math
import os
from collections.abc import Mapping
from typing import Protocol, runtime_checkable

from models.errors import FeatureError

__all__ = ["Scorer", "split_features", "PURE_PYTHON"]

#: ``TIDEWATCH_PURE_PYTHON=1``: the C accelerators (``service/_hotpath.c``, ``models/_hstcore.c``,
#: ``models/_baselinecore.c``) stay off in this process, to compare or to rule them out; the Python code
#: they stand in for does the same work.
PURE_PYTHON = os.environ.get("TIDEWATCH_PURE_PYTHON", "") not in ("", "0")


@runtime_checkable
class Scorer(Protocol):
    """Anything that learns from and scores one feature mapping at a time."""

    def learn_one(self, x: dict[str, float]) -> None:
        """Update the model with ``x``."""
        ...

    def score_one(self, x: dict[str, float]) -> float:
        """Score ``x`` without learning it; higher means more unusual."""
        ...


def split_features(x: Mapping[str, float]) -> tuple[list[str], list[float]]:
    """Names and float values of the usable features of ``x``, in input order.

    Non-finite values (NaN, ±inf) are dropped, i.e. treated as missing: an aggregation over an
    empty window or a broken exporter must not poison a baseline for good. A key that is not a
    string or a value that is not a real number raises :class:`~models.errors.FeatureError`.
    """
    if type(x) is not dict and not isinstance(x, Mapping):  # a dict is the usual case: no ABC check
        raise FeatureError(f"features must be a mapping of name to number, got {type(x).__name__}")
    names: list[str] = []
    values: list[float] = []
    isfinite = math.isfinite
    for name, value in x.items():
        if type(value) is float and type(name) is str:
            # The usual case (window features are floats named by str): ``float(value)`` is ``value``.
            if isfinite(value):
                names.append(name)
                values.append(value)
            continue
        if not isinstance(name, str):
            raise FeatureError(f"feature names must be strings, got {name!r}")
        if type(value) is float:
            v = value
        else:
            # bool is an int subclass, but a flag is not a measurement.
            if isinstance(value, bool) or isinstance(value, (str, bytes)):
                raise FeatureError(f"feature {name!r} must be a number, got {value!r}")
            try:
                v = float(value)
            except (TypeError, ValueError) as exc:
                raise FeatureError(f"feature {name!r} must be a number, got {value!r}") from exc
        if isfinite(v):
            names.append(name)
            values.append(v)
    return names, values
