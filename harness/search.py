"""Searches on the full PDE: the pulse height really needed (bisection on the height) and where a
regime boundary really is (bisection on the sweep parameter).

Each search is a small state machine that asks for runs and is told their results, so that a driver can
advance many searches at once, one round of parallel runs at a time, and reuse stored runs.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = ["BoundarySearch", "ThresholdSearch"]


@dataclass
class ThresholdSearch:
    """Bisection on the pulse magnitude for the least height that patterns.

    Starting from the heights already run (``seen``), it expands by factors of 2 below the lowest height
    that patterned / above the highest that did not (up to ``cap``), then bisects until
    ``high - low <= tol * high``. The bracket is always made of runs actually made.
    """

    cap: float
    tol: float = 0.02
    seen: dict[float, bool] = field(default_factory=dict)
    floor: float = 1e-6
    blocked_above: float | None = None

    def tell(self, height: float, patterned: bool | None) -> None:
        """Record one run: ``patterned`` None means no verdict (the height is then avoided)."""
        if patterned is None:
            self.blocked_above = height if self.blocked_above is None else min(self.blocked_above, height)
            return
        self.seen[float(height)] = bool(patterned)

    @property
    def low(self) -> float | None:
        """Highest height that did not pattern, below the lowest that did."""
        high = self.high
        lows = [h for h, p in self.seen.items() if not p and (high is None or h < high)]
        return max(lows) if lows else None

    @property
    def high(self) -> float | None:
        """Lowest height that patterned."""
        highs = [h for h, p in self.seen.items() if p]
        return min(highs) if highs else None

    @property
    def status(self) -> str:
        """``bracketed``, ``never-patterned``, ``always-patterned`` or ``searching``."""
        if self.next_height() is not None:
            return "searching"
        if self.high is None:
            return "never-patterned"
        if self.low is None:
            return "always-patterned"
        return "bracketed"

    def next_height(self) -> float | None:
        """The next height to run, or None when the search is over."""
        low, high = self.low, self.high
        limit = self.cap if self.blocked_above is None else min(self.cap, self.blocked_above)
        if high is None:
            start = max(self.seen) if self.seen else None
            if start is None:
                return min(limit, 1.0)
            nxt = min(2.0 * start, limit)
            if self.blocked_above is not None and nxt >= self.blocked_above:
                if self.blocked_above - start <= self.tol * self.blocked_above:
                    return None
                nxt = 0.5 * (start + self.blocked_above)
            return nxt if nxt > start * (1 + 1e-9) and nxt not in self.seen else None
        if low is None:
            nxt = 0.5 * high
            return nxt if nxt >= self.floor else None
        if high - low <= self.tol * high:
            return None
        return 0.5 * (low + high)


@dataclass
class BoundarySearch:
    """Bisection on the sweep parameter between two points whose PDE behaviour differs.

    ``signature(value)`` results are told by the driver; the search stops when the bracket is below
    ``tol`` times the original spacing.
    """

    left: float
    right: float
    sig_left: tuple
    sig_right: tuple
    tol: float = 0.125
    width0: float = field(init=False)
    done: bool = False

    def __post_init__(self) -> None:
        self.width0 = abs(self.right - self.left)

    def next_value(self) -> float | None:
        """The next sweep value to run, or None when located to tolerance."""
        if self.done or abs(self.right - self.left) <= self.tol * self.width0:
            return None
        return 0.5 * (self.left + self.right)

    def stop(self) -> None:
        """End the search at the bracket reached (a run gave no verdict)."""
        self.done = True

    def tell(self, value: float, signature: tuple) -> None:
        """Narrow the bracket with the behaviour seen at ``value`` (a third behaviour moves the right end)."""
        if signature == self.sig_left:
            self.left = value
        else:
            self.right, self.sig_right = value, signature
