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


def first_seen_and_index(keys) -> tuple[list[int], list[int]]:
    """(first_seen(keys), first_index of those numbers) in one pass: the
    number of each key and the index of the first key given each number."""
    seen: dict = {}
    numbers: list[int] = []
    first: list[int] = []
    for k, key in enumerate(keys):
        n = seen.get(key)
        if n is None:
            n = seen[key] = len(first)
            first.append(k)
        numbers.append(n)
    return numbers, first


def first_index(labels: list[int]) -> list[int]:
    """For labels numbering 0..m-1 (each used at least once), the index of
    the first appearance of each."""
    # Walking backwards, the last index written for a label is its first.
    first = dict(zip(reversed(labels), range(len(labels) - 1, -1, -1)))
    return [first[n] for n in range(len(first))]


def group_mean(x: np.ndarray, group: np.ndarray, counts: np.ndarray, crowded: list[int]) -> np.ndarray:
    """Mean of x over each group (group: number per element, counts: elements
    per group), equal to np.mean of the group's values: bincount adds in
    order as np.mean does below 8 values, and any order gives the same sum of
    whole numbers. crowded: the groups of 8 or more."""
    out = np.bincount(group, weights=x, minlength=counts.size) / counts
    if crowded and not (x == np.rint(x)).all():
        for g in crowded:
            out[g] = np.mean(x[group == g])
    return out
