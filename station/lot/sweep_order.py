"""The order in which a sweep visits its bench conditions (pure; used by the sequencer and
by the benchmark's physics floor, which must follow the same path).

The slow (thermal) part of the loop's settling grows with the size of each source step, so
the conditions are visited in monotonic order of the rails and force, starting from the end
nearer to where the bench stands: every step is then as small as the sweep allows.
"""

from __future__ import annotations

Condition = tuple[tuple[float, float], float]   # ((V+, V-), force level)


def visit_order(conditions: list[Condition], current: Condition | None = None) -> list[int]:
    """Indexes of `conditions` in the order to visit them."""
    order = sorted(range(len(conditions)), key=lambda i: (conditions[i][0][1], conditions[i][1]), reverse=True)
    if current is not None and len(order) > 1:
        first, last = conditions[order[0]], conditions[order[-1]]
        if _distance(current, last) < _distance(current, first):
            order.reverse()
    return order


def _distance(a: Condition, b: Condition) -> float:
    (p0, m0), f0 = a
    (p1, m1), f1 = b
    return abs(p1 - p0) + abs(m1 - m0) + abs(f1 - f0)
