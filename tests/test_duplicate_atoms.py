"""The reader's test for atoms written twice (`read._duplicates`) against a
pair-by-pair reference, on random cells with planted near pairs.

`_duplicates` takes three paths by the number of atoms (one matrix product up
to 16 atoms, every pair up to 64, bins beyond, with four shifted grids that
settle the usual case first); all of them must mark exactly the atoms the
definition marks: a later atom of the same element within MERGE_TOL (0.1 A)
of an earlier one, by the nearest periodic image, when the two occupancies add
up to more than one atom.  The reference measures every pair against all 27
neighbouring images, so it does not lean on the rounding argument the reader
uses (common practice, no source: the minimum-image convention).  Hypothesis
draws the cases, derandomized with a fixed number of examples, so CI runs the
same inputs every time.
"""
from __future__ import annotations

import itertools

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from bondcheck import read as R

SHIFTS = np.array(list(itertools.product((-1, 0, 1), repeat=3)), dtype=float)


def reference(pos, cell, numbers, occ):
    """Mask of the later copies, pair by pair, or None (as `_duplicates`)."""
    n = len(pos)
    dup = np.zeros(n, dtype=bool)
    for j in range(1, n):
        for i in range(j):
            if numbers[i] != numbers[j] or not occ[i] + occ[j] > 1.0 + R.OCC_TOL:
                continue
            d = (pos[j] - pos[i] + SHIFTS) @ cell
            if np.min(np.einsum("ij,ij->i", d, d)) < R.MERGE_TOL ** 2:
                dup[j] = True
                break
    return dup if dup.any() else None


def random_cell(rng, lo, hi):
    """A triclinic cell of lengths lo-hi A and angles 65-115 degrees, kept
    when no width between faces is below the reader's minimum."""
    while True:
        a, b, c = rng.uniform(lo, hi, 3)
        al, be, ga = np.radians(rng.uniform(65.0, 115.0, 3))
        cx = c * np.cos(be)
        cy = c * (np.cos(al) - np.cos(be) * np.cos(ga)) / np.sin(ga)
        cz2 = c * c - cx * cx - cy * cy
        if cz2 <= 1.0:
            continue
        cell = np.array([[a, 0, 0], [b * np.cos(ga), b * np.sin(ga), 0], [cx, cy, np.sqrt(cz2)]])
        try:
            _vol, widths = R._check_widths(cell)
        except R.StructureError:
            continue
        return cell, widths


@settings(max_examples=150, deadline=None, derandomize=True)
@given(seed=st.integers(0, 2**32 - 1), n=st.sampled_from([5, 16, 17, 40, 64, 65, 90, 160]),
       planted=st.integers(0, 3), partial=st.booleans())
def test_duplicates_match_the_pair_by_pair_definition(seed, n, planted, partial):
    rng = np.random.default_rng(seed)
    # Beyond 64 atoms, cells large enough that random atoms seldom share a
    # bin of the quick test, so that the planted pairs decide it.
    cell, widths = random_cell(rng, 3.0, 14.0) if n <= 64 else random_cell(rng, 18.0, 40.0)
    inv = np.linalg.inv(cell)
    pos = rng.random((n, 3))
    numbers = rng.choice([8, 14, 26], n)
    occ = np.where(rng.random(n) < 0.3, 0.5, 1.0) if partial else np.ones(n)
    if rng.random() < 0.5:  # atoms on faces, as P 1 files list them
        pos[: n // 4, int(rng.integers(3))] = 0.0
    # Copies of random atoms, moved by up to 1.5 MERGE_TOL in a random
    # direction (so some within the tolerance, some just outside); half of
    # the originals first put on a face of the cell, so that their copies
    # often lie across it (near pairs only through the periodic image).
    for _ in range(planted):
        k = int(rng.integers(n))
        if rng.random() < 0.5:
            pos[k, int(rng.integers(3))] = 0.0
        step = rng.normal(size=3)
        step *= rng.uniform(0.0, 1.5 * R.MERGE_TOL) / np.linalg.norm(step)
        pos = np.vstack([pos, pos[k] + step @ inv])
        numbers = np.append(numbers, numbers[k])
        occ = np.append(occ, occ[k] if rng.random() < 0.8 else 0.5)
    pos = R._wrap(pos)
    got = R._duplicates(pos, cell, widths, numbers, occ)
    want = reference(pos, cell, numbers, occ)
    if want is None:
        assert got is None
    else:
        assert got is not None and got.tolist() == want.tolist()


def test_grid_test_never_settles_a_near_pair():
    # The quick test's own claim, on pairs right at the tolerance across
    # every face and corner of a small and a long, skewed cell.
    for cell in (np.diag([3.1, 3.1, 3.1]),
                 np.array([[9.0, 0.0, 0.0], [-4.2, 7.6, 0.0], [1.3, -2.2, 15.4]])):
        _vol, widths = R._check_widths(cell)
        inv = np.linalg.inv(cell)
        rng = np.random.default_rng(7)
        starts = [np.array(c) for c in itertools.product((0.0, 1.0 - 1e-12), repeat=3)] + list(rng.random((40, 3)))
        for start in starts:
            for _ in range(20):
                step = rng.normal(size=3)
                step *= 0.999 * R.MERGE_TOL / np.linalg.norm(step)
                pos = R._wrap(np.array([start, start + step @ inv]))  # the pair alone
                assert not R._apart_on_grids(pos, widths)
        # and two atoms far apart are settled (the test does say 'apart')
        assert R._apart_on_grids(np.array([[0.1, 0.1, 0.1], [0.6, 0.6, 0.6]]), widths)
