"""The time-left estimate shared by the terminal bar and the workbench."""

import pytest

from core.engine.timeleft import TimeLeft, time_left_text


class Clock:
    def __init__(self):
        self.now = 100.0

    def __call__(self):
        return self.now


def test_at_a_steady_rate_the_estimate_is_the_work_left_over_the_rate():
    """Arithmetic: 10 units per second with 900 units left is 90 s; nothing before 5 % of the work."""
    clock = Clock()
    left = TimeLeft(clock)
    seen = []
    for done in range(10, 1001, 10):  # the first call comes after a batch of start-up, which the estimate leaves out
        seen.append((done, left.update(done, 1000)))
        clock.now += 1.0
    assert all(v is None for d, v in seen if d < 50)
    assert dict(seen)[100] == pytest.approx(90.0) and dict(seen)[500] == pytest.approx(50.0)


def test_a_new_total_starts_a_new_estimate():
    clock = Clock()
    left = TimeLeft(clock)
    for done in range(0, 500, 50):
        left.update(done, 1000)
        clock.now += 1
    assert left.update(600, 2000) is None  # another computation: no estimate from the old rate


@pytest.mark.parametrize("seconds, text", [(None, ""), (4.4, "4 s left"), (150, "2 min left"), (3 * 3600 + 5 * 60, "3 h 05 min left")])
def test_time_left_reads_in_plain_units(seconds, text):
    assert time_left_text(seconds) == text
