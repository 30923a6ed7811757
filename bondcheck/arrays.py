"""Small helpers the stages share on their per-structure path, where arrays
hold tens of atoms and plain Python lists beat numpy's per-call cost."""
from __future__ import annotations

import numpy as np


def filled(n: int, value: float) -> np.ndarray:
    """np.full(n, value) of floats, without np.full's Python-level steps."""
    a = np.empty(n)
    a.fill(value)
    return a


def first_seen(keys) -> list[int]:
    """Number equal keys 0, 1, 2, ... in order of first appearance."""
    seen: dict = {}
    return [seen.setdefault(key, len(seen)) for key in keys]


def first_index(labels: list[int]) -> list[int]:
    """For labels numbering 0..m-1 (each used at least once), the index of
    the first appearance of each."""
    # Walking backwards, the last index written for a label is its first.
    first = dict(zip(reversed(labels), range(len(labels) - 1, -1, -1)))
    return [first[n] for n in range(len(first))]
