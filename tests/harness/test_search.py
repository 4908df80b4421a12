"""Threshold and boundary searches: brackets of runs actually made, to tolerance."""

from __future__ import annotations

import pytest

from harness.search import BoundarySearch, ThresholdSearch


def _drive(search: ThresholdSearch, truth: float, limit: int = 100) -> list[float]:
    asked = []
    while (h := search.next_height()) is not None and len(asked) < limit:
        asked.append(h)
        search.tell(h, h >= truth)
    return asked


@pytest.mark.parametrize("truth", [0.013, 0.3, 0.99, 3.7])
def test_threshold_search_brackets_truth(truth):
    """From a seed below or above, the bracket holds the true threshold and meets the tolerance."""
    s = ThresholdSearch(cap=10.0, tol=0.02)
    s.tell(0.5, 0.5 >= truth)
    asked = _drive(s, truth)
    assert s.status == "bracketed"
    assert s.low < truth <= s.high
    assert s.high - s.low <= 0.02 * s.high
    assert all(h in s.seen for h in asked)  # every bracket end is a run that was made


def test_threshold_search_never_and_always():
    """No pattern up to the cap: never-patterned; patterns down to the floor: always-patterned."""
    s = ThresholdSearch(cap=4.0)
    s.tell(1.0, False)
    _drive(s, truth=100.0)
    assert s.status == "never-patterned" and s.high is None and s.low == 4.0
    s = ThresholdSearch(cap=4.0, floor=1e-3)
    s.tell(1.0, True)
    _drive(s, truth=0.0)
    assert s.status == "always-patterned" and s.low is None


def test_threshold_search_stops_below_inadmissible_height():
    """A height with no verdict (e.g. an inadmissible start) caps the upward expansion."""
    s = ThresholdSearch(cap=100.0)
    s.tell(1.0, False)
    s.tell(2.0, None)
    asked = _drive(s, truth=100.0)
    assert asked and all(1.0 < h < 2.0 for h in asked)
    assert s.status == "never-patterned"


def test_boundary_search_locates_switch():
    """Bisection on the sweep value brackets a behaviour switch to the tolerance of the spacing."""
    b = BoundarySearch(0.0, 1.0, (False, False), (True, True), tol=0.01)
    while (v := b.next_value()) is not None:
        b.tell(v, (v > 0.37, v > 0.37))
    assert b.left <= 0.37 < b.right and b.right - b.left <= 0.01
