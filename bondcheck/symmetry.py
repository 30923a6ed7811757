"""Crystallographic sites: spglib groups symmetry-equivalent atoms.

Entries that share a position (mixed sites) are given one spglib type per
distinct (elements, occupancies) combination, so a Ga/Ge site stays one site.

`group_sites` is the fast alternative for database scans (Options(symmetry=
False)): atoms are grouped by their environments instead of by symmetry
operations, and no space group or Wyckoff letters are reported. Atoms of one
orbit always have equal environments; atoms of different orbits with equal
environments (rare) end up in one site.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .record import Crystal

SYMPREC = 0.01  # angstrom


@dataclass(slots=True)
class Sites:
    """site[k] is the site index of atom k; per site: representative atom,
    multiplicity (Wyckoff multiplicity in the conventional cell) and Wyckoff
    letter."""

    site: np.ndarray
    representative: np.ndarray
    multiplicity: np.ndarray | None  # None when symmetry was not determined
    wyckoff: list[str | None]
    spacegroup: str
    spacegroup_number: int


def _positions(crystal: Crystal):
    """Group entries that share a position; returns (position index per entry,
    unique fractional positions, type per position)."""
    frac = np.mod(crystal.frac, 1.0)
    key = np.round(frac * 2000).astype(np.int64) % 2000
    # One integer per rounded position, ordered as the rows (x, y, z) are.
    key = (key[:, 0] * 2000 + key[:, 1]) * 2000 + key[:, 2]
    if np.all(crystal.occupancy >= 0.999):
        sk = np.sort(key)
        if sk.size < 2 or np.all(sk[1:] != sk[:-1]):
            return np.arange(crystal.natoms), frac, crystal.numbers.astype(np.int64)
    _, pos_of, inverse = np.unique(key, return_index=True, return_inverse=True)
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
        wyckoff=[wy[r] for r in reps],
        spacegroup=sg,
        spacegroup_number=num,
    )


# Environments of atoms of one orbit differ by at most twice the position
# tolerance spglib is given.
ENV_TOL = 2 * SYMPREC + 1e-6


def group_sites(crystal: Crystal, contacts) -> Sites:
    """Sites without a symmetry search: atoms (positions, for mixed sites)
    are grouped when they have the same type, the same number of contacts
    to each partner type (every contact the bond stage keeps) and, partner
    type by partner type, the same distances within ENV_TOL; the grouping is
    then refined until the partners of the atoms of a group fall in the same
    groups. Sites are numbered in order of their first atom, as with spglib."""
    pos_index, positions, types = _positions(crystal)
    npos = positions.shape[0]
    pi = pos_index[contacts.i]
    pj = pos_index[contacts.j]
    d = contacts.d
    if npos < crystal.natoms:
        # Several entries share a position: one contact per pair of positions.
        flip = pi > pj
        key = np.column_stack([np.where(flip, pj, pi), np.where(flip, pi, pj), np.where(flip[:, None], -contacts.shift, contacts.shift)])
        _, sel = np.unique(key, axis=0, return_index=True)
        pi, pj, d = pi[sel], pj[sel], d[sel]
    # Both ends of every contact, sorted by atom, partner type and distance.
    a = np.concatenate([pi, pj])
    b = np.concatenate([pj, pi])
    dd = np.concatenate([d, d])
    lut = np.zeros(int(types.max()) + 1, dtype=np.int64)
    present = np.zeros(lut.size, dtype=bool)
    present[types] = True
    nt = int(present.sum())
    lut[present] = np.arange(nt)
    tcode = lut[types]
    tb = tcode[b]
    order = np.lexsort((dd, tb, a))
    a, b, dd, tb = a[order], b[order], dd[order], tb[order]
    ncont = np.bincount(a, minlength=npos)
    # Classes: own type and the number of contacts to each partner type.
    partners = np.bincount(a * nt + tb, minlength=npos * nt).reshape(npos, nt)
    cls = _first_seen(np.column_stack([tcode, partners]))
    # Distances in a padded table: within a class the rows line up.
    width = int(ncont.max()) if a.size else 0
    table = np.zeros((npos, width))
    starts = np.cumsum(ncont) - ncont
    table[a, np.arange(a.size) - starts[a]] = dd
    # Each atom joins the first atom of its class whose distances agree.
    if npos * npos * max(width, 1) <= 2_000_000:
        same = cls[:, None] == cls[None, :]
        if width:
            same &= np.abs(table[:, None, :] - table[None, :, :]).max(axis=2) <= ENV_TOL
        first = np.argmax(same, axis=1)
    else:
        first = np.empty(npos, dtype=np.int64)
        for c in range(int(cls.max()) + 1):
            members = np.flatnonzero(cls == c)
            rows = table[members]
            close = np.ones((members.size, members.size), dtype=bool)
            if width:
                close = np.abs(rows[:, None, :] - rows[None, :, :]).max(axis=2) <= ENV_TOL
            first[members] = members[np.argmax(close, axis=1)]
    label = _first_seen(first[:, None])
    # Refine: the numbers of partners in each group must agree too.
    ngroup = int(label.max()) + 1
    while a.size:
        counts = np.bincount(a * ngroup + label[b], minlength=npos * ngroup).reshape(npos, ngroup)
        refined = _first_seen(np.column_stack([label, counts]))
        n_new = int(refined.max()) + 1
        if n_new == ngroup:
            break
        label, ngroup = refined, n_new
    # Labels count up in order of first appearance: they are the site numbers.
    first_pos = np.full(ngroup, npos, dtype=np.int64)
    np.minimum.at(first_pos, label, np.arange(npos))
    first_entry = np.full(npos, crystal.natoms, dtype=np.int64)
    np.minimum.at(first_entry, pos_index, np.arange(crystal.natoms))
    return Sites(
        site=label[pos_index],
        representative=first_entry[first_pos],
        multiplicity=None,
        wyckoff=[None] * ngroup,
        spacegroup="",
        spacegroup_number=0,
    )


def _first_seen(rows: np.ndarray) -> np.ndarray:
    """Number equal rows 0, 1, 2, ... in order of first appearance."""
    rows = np.ascontiguousarray(rows, dtype=np.int64)
    seen: dict[bytes, int] = {}
    return np.array([seen.setdefault(r.tobytes(), len(seen)) for r in rows], dtype=np.int64)
