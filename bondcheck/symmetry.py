"""Crystallographic sites: spglib groups symmetry-equivalent atoms.

Entries that share a position (mixed sites) are given one spglib type per
distinct (elements, occupancies) combination, so a Ga/Ge site stays one site.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .record import Crystal

SYMPREC = 0.01  # angstrom


@dataclass(slots=True)
class Sites:
    """site[k] is the site index of atom k; per site: representative atom,
    multiplicity (Wyckoff multiplicity in the conventional cell), Wyckoff
    letter and the number of atoms of the site in the input cell."""

    site: np.ndarray
    representative: np.ndarray
    multiplicity: np.ndarray
    count_in_cell: np.ndarray
    wyckoff: list[str]
    spacegroup: str
    spacegroup_number: int


def _positions(crystal: Crystal):
    """Group entries that share a position; returns (position index per entry,
    unique fractional positions, type per position)."""
    frac = np.mod(crystal.frac, 1.0)
    key = np.round(frac * 2000).astype(np.int64) % 2000
    _, pos_of, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    npos = pos_of.size
    if npos == crystal.natoms and np.all(crystal.occupancy >= 0.999):
        types = crystal.numbers.astype(np.int64)
        return np.arange(crystal.natoms), frac, types
    # Composite type per position: sorted (Z, occupancy) tuples.
    combos: dict[int, list] = {}
    for k, p in enumerate(inverse):
        combos.setdefault(int(p), []).append((int(crystal.numbers[k]), round(float(crystal.occupancy[k]), 3)))
    names: dict[tuple, int] = {}
    types = np.empty(npos, dtype=np.int64)
    for p in range(npos):
        t = tuple(sorted(combos[p]))
        types[p] = names.setdefault(t, len(names) + 1)
    return inverse, frac[pos_of], types


def find_sites(crystal: Crystal, symprec: float = SYMPREC) -> Sites:
    import spglib

    if hasattr(spglib, "error"):
        spglib.error.OLD_ERROR_HANDLING = False
    pos_index, positions, types = _positions(crystal)
    npos = positions.shape[0]
    ds = None
    try:
        ds = spglib.get_symmetry_dataset((crystal.cell, positions, types), symprec=symprec)
    except Exception:  # spglib raises on degenerate input; fall back to P1
        ds = None
    if ds is None:
        equiv = np.arange(npos)
        wy = ["a"] * npos
        ratio = 1.0
        sg, num = "P1", 1
    else:
        equiv = np.asarray(ds.equivalent_atoms)
        wy = list(ds.wyckoffs)
        det = abs(np.linalg.det(np.asarray(ds.transformation_matrix)))
        ratio = 1.0 / det if det > 0 else 1.0
        sg, num = ds.international, int(ds.number)
    # Site index per position, in order of first appearance.
    reps, site_of_pos = np.unique(equiv, return_inverse=True)
    site_of_pos = site_of_pos.reshape(-1)
    count = np.bincount(site_of_pos, minlength=reps.size)
    mult = np.maximum(1, np.rint(count * ratio)).astype(np.int64)
    site = site_of_pos[pos_index]
    # Representative atom: the first entry at the representative position.
    first_entry = np.full(npos, -1, dtype=np.int64)
    for k in range(crystal.natoms - 1, -1, -1):
        first_entry[pos_index[k]] = k
    representative = first_entry[reps]
    return Sites(
        site=site,
        representative=representative,
        multiplicity=mult,
        count_in_cell=count,
        wyckoff=[wy[r] for r in reps],
        spacegroup=sg,
        spacegroup_number=num,
    )
