"""Blocks of items that bound the memory of a vectorised step, whatever the network's size."""

from __future__ import annotations

__all__ = ["blocks"]


def blocks(count: int, per_item: int, budget: int) -> list[slice]:
    """Slices over ``count`` items (patches, pairs), each block holding at most about
    ``budget`` values when every item carries ``per_item`` of them (at least one item)."""
    step = max(1, budget // max(per_item, 1))
    return [slice(start, start + step) for start in range(0, count, step)]
