"""The order blocks are expanded in: producers before consumers (the standard library's graphlib)."""

from __future__ import annotations

import graphlib
from collections import deque
from collections.abc import Iterable, Mapping

__all__ = ["FlowCycle", "producer_order"]


class FlowCycle(ValueError):
    """The links form a loop; ``members`` are the blocks on it, in the order they were declared."""

    def __init__(self, members: list[str]) -> None:
        super().__init__(f"cycle through {', '.join(members)}")
        self.members = members


def producer_order(names: Iterable[str], edges: Mapping[str, Iterable[str]]) -> list[str]:
    """Names ordered so that every producer comes before its consumers (``edges[a]`` holds what ``a``
    feeds). Ties keep the declaration order; consumers freed by the same producer come sorted.

    >>> producer_order(["sink", "source", "split"], {"source": ["split"], "split": ["sink"]})
    ['source', 'split', 'sink']
    """
    names = list(names)
    sorter: graphlib.TopologicalSorter[str] = graphlib.TopologicalSorter()
    for name in names:
        sorter.add(name)
    for producer, consumers in edges.items():
        for consumer in consumers:
            sorter.add(consumer, producer)
    try:
        sorter.prepare()
    except graphlib.CycleError as error:
        on_cycle = set(error.args[1])
        raise FlowCycle([n for n in names if n in on_cycle]) from None
    order: list[str] = []
    ready = deque(sorter.get_ready())
    while ready:
        name = ready.popleft()
        order.append(name)
        sorter.done(name)
        ready.extend(sorted(sorter.get_ready()))
    return order
