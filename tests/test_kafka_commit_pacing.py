"""When the Kafka loop commits (:class:`service.kafka_bus.CommitPacer`): no broker, no clock.

The pacer is handed the times; these tests walk it through a caught-up loop, a backlog and the
switch between them, and check each decision against the rule in its docstring.
"""

from __future__ import annotations

import pytest

from service.kafka_bus import CommitPacer

MIN = 20_000  # messages still to read from which a backlog stretches the commits


def behind() -> int:  # the runner's lag reading, far behind
    return 500_000


def test_caught_up_commits_early_when_scores_wait_but_not_more_than_ten_times_an_interval() -> None:
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    p.committed(started=0.0, ended=0.01)
    assert not p.due(0.05, caught_up=True, scores_waiting=True, backlog=behind)  # a tenth of an interval not yet gone
    assert p.due(0.12, caught_up=True, scores_waiting=True, backlog=behind)
    assert not p.due(0.12, caught_up=True, scores_waiting=False, backlog=behind)  # nothing to show: the interval commits
    assert p.due(1.0, caught_up=True, scores_waiting=False, backlog=behind)


def test_a_backlog_commits_on_the_interval_until_a_commit_was_timed() -> None:
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    assert not p.due(0.99, caught_up=False, scores_waiting=True, backlog=behind)  # no early commit under a backlog
    assert p.due(1.0, caught_up=False, scores_waiting=True, backlog=behind)


def test_a_backlog_stretches_the_interval_to_bound_the_commits_share() -> None:
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN, work_per_commit=15.0, stretch_max=10.0)
    p.committed(started=1.0, ended=1.3)  # 0.3 s: 4.5 s of messages before the next commit
    assert not p.due(2.5, caught_up=False, scores_waiting=True, backlog=behind)
    assert not p.due(5.79, caught_up=False, scores_waiting=True, backlog=behind)
    assert p.due(5.81, caught_up=False, scores_waiting=True, backlog=behind)  # the commit then took 0.3 of 4.8 s: 1/16


def test_the_stretch_is_capped() -> None:
    p = CommitPacer(0.5, now=0.0, min_backlog=MIN, work_per_commit=15.0, stretch_max=10.0)
    p.committed(started=0.5, ended=4.5)  # a 4 s commit would ask for 60 s; the cap is 10 intervals
    assert not p.due(9.49, caught_up=False, scores_waiting=True, backlog=behind)
    assert p.due(9.51, caught_up=False, scores_waiting=True, backlog=behind)


def test_catching_up_ends_the_stretch_at_once() -> None:
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    p.committed(started=1.0, ended=1.4)  # under a backlog: 6 s of work due
    assert not p.due(3.0, caught_up=False, scores_waiting=True, backlog=behind)
    # The first batch that is not full: the scores waiting go now, as when the loop was never behind.
    assert p.due(3.0, caught_up=True, scores_waiting=True, backlog=behind)
    assert p.due(3.0, caught_up=True, scores_waiting=False, backlog=behind)  # the interval tick (2.0) has passed too


def test_the_interval_keeps_a_fixed_rate() -> None:
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    p.committed(started=1.0, ended=1.2)  # on the tick: the next one is at 2.0, not 2.2
    assert p.next_tick == pytest.approx(2.0)
    p.committed(started=1.5, ended=1.55)  # an early commit leaves the tick where it was
    assert p.next_tick == pytest.approx(2.0)
    p.committed(started=2.0, ended=3.7)  # overloaded: longer than an interval, a whole interval from its end
    assert p.next_tick == pytest.approx(4.7)


def test_a_full_batch_with_little_left_to_read_commits_on_the_interval() -> None:
    # Caught up but for the input that gathered while a burst of windows was scored: no stretch.
    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    p.committed(started=1.0, ended=1.4)  # 6 s of work would be due under a real backlog
    assert not p.due(1.9, caught_up=False, scores_waiting=True, backlog=lambda: 3_000)  # before the tick
    assert p.due(2.0, caught_up=False, scores_waiting=True, backlog=lambda: 3_000)
    assert not p.due(2.0, caught_up=False, scores_waiting=True, backlog=lambda: MIN)


def test_the_backlog_is_asked_only_when_the_decision_turns_on_it() -> None:
    asked = []

    def backlog() -> int:
        asked.append(1)
        return 500_000

    p = CommitPacer(1.0, now=0.0, min_backlog=MIN)
    p.committed(started=1.0, ended=1.4)
    p.due(1.5, caught_up=False, scores_waiting=True, backlog=backlog)  # before the tick: no
    p.due(2.5, caught_up=True, scores_waiting=True, backlog=backlog)  # caught up: no
    assert asked == []
    assert not p.due(2.5, caught_up=False, scores_waiting=True, backlog=backlog)
    assert asked == [1]
