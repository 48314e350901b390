"""Change-point F1 against several human annotators, as in the TCPD benchmark.

Source: van den Burg & Williams 2020, "An Evaluation of Change Point Detection
Algorithms", arXiv:2003.06222, section on the F1 metric; behaviour checked against
the benchmark's reference metric (``analysis/scripts/metrics.py`` of TCPDBench).

Definitions (locations are 0-based row indices):

* A prediction ``x`` matches an annotation ``tau`` when ``|tau - x| <= margin``
  (margin 5 in the paper). Each prediction matches at most one annotation, so a
  burst of predictions around one change counts once: annotations are visited in
  ascending order and each takes its nearest still-free prediction (the smaller
  one on a tie). The reference code walks a Python set instead, which for these
  small integers is the same ascending order.
* Index 0 is added to every annotator's set and to the predictions, so that a
  series without changes still has one matchable point (paper and reference code).
* Precision compares the predictions with the union of all annotators:
  ``P = |TP(union, X)| / |X|``. Recall is averaged over annotators:
  ``R = mean_k |TP(T_k, X)| / |T_k|``. ``F = P R / (alpha R + (1 - alpha) P)``,
  with ``alpha = 1/2`` giving the F1 score.

>>> round(f_measure({"a": [], "b": [10], "c": [50]}, [10]), 7)
0.9090909
>>> f_measure({"a": [], "b": [10], "c": [50]}, [])
0.8
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

from service.errors import TidewatchError

__all__ = [
    "ChangePointInputError",
    "DEFAULT_MARGIN",
    "ChangePointScore",
    "true_positives",
    "change_point_score",
    "f_measure",
    "onsets",
]

# The paper's margin of tolerance, in rows.
DEFAULT_MARGIN = 5


class ChangePointInputError(TidewatchError, ValueError):
    """Annotations, predictions or parameters cannot be scored as given."""


@dataclass(frozen=True, slots=True)
class ChangePointScore:
    """F-measure with its precision and recall."""

    f: float
    precision: float
    recall: float


def _locations(values: Iterable[int], what: str) -> set[int]:
    out: set[int] = set()
    for v in values:
        try:
            whole = not isinstance(v, (bool, str)) and int(v) == v
        except (TypeError, ValueError, OverflowError):
            whole = False
        if not whole:
            raise ChangePointInputError(f"{what}: {v!r} is not a row index")
        if v < 0:
            raise ChangePointInputError(f"{what}: {v!r} is negative; locations are 0-based row indices")
        out.add(int(v))
    return out


def true_positives(annotations: Iterable[int], predictions: Iterable[int], margin: int = DEFAULT_MARGIN) -> set[int]:
    """The annotations matched by a prediction within ``margin``, without double counting.

    >>> sorted(true_positives({1, 10, 20, 23}, {3, 8, 20}))
    [1, 10, 20]
    >>> sorted(true_positives({10}, {5, 6, 14, 15}))   # four candidates, one match
    [10]
    """
    if margin < 0:
        raise ChangePointInputError(f"margin must be >= 0, got {margin}")
    free = sorted(_locations(predictions, "predictions"))
    matched: set[int] = set()
    for tau in sorted(_locations(annotations, "annotations")):
        near = [x for x in free if abs(tau - x) <= margin]
        if not near:
            continue
        nearest = min(near, key=lambda x: (abs(tau - x), x))
        free.remove(nearest)
        matched.add(tau)
    return matched


def change_point_score(
    annotations: Mapping[str, Sequence[int]],
    predictions: Iterable[int],
    *,
    margin: int = DEFAULT_MARGIN,
    alpha: float = 0.5,
) -> ChangePointScore:
    """F-measure, precision and recall of predicted change points against annotators.

    Parameters
    ----------
    annotations
        Annotator id -> that annotator's change-point locations (possibly none).
    predictions
        Predicted locations; duplicates are ignored.
    margin
        Largest distance at which a prediction still matches.
    alpha
        Weight of precision; 0.5 gives F1.

    >>> s = change_point_score({"a": [10, 20], "b": [11, 20], "c": [10], "d": [0, 5]}, [10, 20])
    >>> s.f, s.precision, s.recall
    (1.0, 1.0, 1.0)
    """
    if not annotations:
        raise ChangePointInputError("at least one annotator is needed")
    if not 0.0 < alpha < 1.0:
        raise ChangePointInputError(f"alpha must lie strictly between 0 and 1, got {alpha}")
    per_annotator = [_locations(locs, f"annotator {uid!r}") | {0} for uid, locs in annotations.items()]
    predicted = _locations(predictions, "predictions") | {0}
    union = set().union(*per_annotator)
    precision = len(true_positives(union, predicted, margin)) / len(predicted)
    recall = sum(len(true_positives(t, predicted, margin)) / len(t) for t in per_annotator) / len(per_annotator)
    # Index 0 always matches itself, so precision and recall are both positive.
    f = precision * recall / (alpha * recall + (1.0 - alpha) * precision)
    return ChangePointScore(f, precision, recall)


def f_measure(
    annotations: Mapping[str, Sequence[int]],
    predictions: Iterable[int],
    *,
    margin: int = DEFAULT_MARGIN,
    alpha: float = 0.5,
) -> float:
    """The F-measure alone (see :func:`change_point_score`)."""
    return change_point_score(annotations, predictions, margin=margin, alpha=alpha).f


def onsets(flags: Iterable[bool]) -> list[int]:
    """Indices where a run of True starts (rising edges); a leading True counts at 0.

    An alert that stays on for several windows is one predicted change, at its onset.

    >>> onsets([False, True, True, False, True])
    [1, 4]
    >>> onsets([True, False])
    [0]
    """
    out: list[int] = []
    prev = False
    for i, flag in enumerate(flags):
        flag = bool(flag)
        if flag and not prev:
            out.append(i)
        prev = flag
    return out
