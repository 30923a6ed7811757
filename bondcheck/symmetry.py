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

import math
from dataclasses import dataclass

import numpy as np

from . import elements
from .arrays import first_index, first_seen, first_seen_and_index
from .bonds import SEARCH
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


# Place values of the rounded x, y and z in a position's integer key.
_DIGITS = np.array([2000 * 2000, 2000, 1], dtype=np.int64)


def _positions(crystal: Crystal):
    """Group entries that share a position; returns (position index per entry,
    unique fractional positions, type per position).  The position index is
    None when each entry is a position of its own, numbered as the entries."""
    frac = np.mod(crystal.frac, 1.0)
    key = (frac * 2000).round().astype(np.int64) % 2000
    # One integer per rounded position, ordered as the rows (x, y, z) are.
    key = key @ _DIGITS
    # (np.minimum.reduce(x) is x.min() without the method's Python-level wrapper)
    occ = crystal.occupancy
    if (not occ.size or np.minimum.reduce(occ) >= 0.999) and len(set(key.tolist())) == key.size:
        # Fully occupied atoms at distinct positions: each is a position.
        return None, frac, crystal.numbers.astype(np.int64, copy=False)
    _, pos_of, inverse = np.unique(key, return_index=True, return_inverse=True)
    inverse = inverse.reshape(-1)
    npos = pos_of.size
    # Composite type per position: sorted (Z, occupancy) tuples.
    zs, occs = crystal.numbers.tolist(), crystal.occupancy.tolist()
    combos: dict[int, list] = {}
    for k, p in enumerate(inverse.tolist()):
        combos.setdefault(p, []).append((zs[k], round(occs[k], 3)))
    names: dict[tuple, int] = {}
    types = np.empty(npos, dtype=np.int64)
    for p in range(npos):
        t = tuple(sorted(combos[p]))
        types[p] = names.setdefault(t, len(names) + 1)
    return inverse, frac[pos_of], types


# Atoms closer than this are always among the bond stage's contacts: within
# SEARCH times the smallest sum of two radii (He-He), with a margin.
_ALWAYS_CONTACT = 0.98 * SEARCH * 2 * float(elements.radii()[1:].min())


def _entries_apart(crystal: Crystal, contacts) -> bool:
    """True when _positions would surely find each entry a position of its
    own, decided from the bond stage's contacts without rounding positions.

    Entries whose rounded positions coincide (1/2000 of the cell along each
    axis) are at most reach = (|a| + |b| + |c|) / 2000 apart.  When reach is
    below _ALWAYS_CONTACT, such a pair is a contact, for fully occupied atoms
    (none dropped as alternatives); so when every contact is longer than
    reach and every occupancy at least 0.999, no two positions coincide.
    False means only that _positions has to decide."""
    occ = crystal.occupancy
    # (np.minimum.reduce(x) is x.min() without the method's Python-level wrapper)
    if not occ.size or not np.minimum.reduce(occ) >= 0.999:
        return False
    (ax, ay, az), (bx, by, bz), (cx, cy, cz) = crystal.cell.tolist()
    reach = (math.sqrt(ax * ax + ay * ay + az * az) + math.sqrt(bx * bx + by * by + bz * bz)
             + math.sqrt(cx * cx + cy * cy + cz * cz)) * (1 + 1e-6) / 2000
    if not reach < _ALWAYS_CONTACT:
        return False
    d = contacts.d
    return not d.size or np.minimum.reduce(d) > reach


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
    # Representative atom: the first entry at the representative position.
    reps = reps.astype(np.int64, copy=False)
    if pos_index is None:  # each entry a position
        site, representative = site_of_pos, reps
    else:
        site = site_of_pos[pos_index]
        representative = np.array(first_index(pos_index.tolist()), dtype=np.int64)[reps]
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
    if _entries_apart(crystal, contacts):  # (the usual case, decided cheaply)
        pos_index, npos, types = None, crystal.natoms, crystal.numbers.astype(np.int64, copy=False)
    else:
        pos_index, positions, types = _positions(crystal)
        npos = positions.shape[0]
    pi, pj, d = contacts.i, contacts.j, contacts.d
    if pos_index is not None:
        pi, pj = pos_index[pi], pos_index[pj]
    if npos < crystal.natoms:
        # Several entries share a position: one contact per pair of positions.
        flip = pi > pj
        key = np.column_stack([np.where(flip, pj, pi), np.where(flip, pi, pj), np.where(flip[:, None], -contacts.shift, contacts.shift)])
        _, sel = np.unique(key, axis=0, return_index=True)
        pi, pj, d = pi[sel], pj[sel], d[sel]
    # Both ends of every contact (atom a, partner b), in no particular order:
    # the counts below do not depend on it.
    a = np.concatenate([pi, pj])
    b = np.concatenate([pj, pi])
    # Type codes 0, 1, ... in order of first appearance: with a position per
    # entry the types are the atomic numbers, which the bond stage has coded.
    codes = contacts.element_codes(crystal.numbers) if pos_index is None else None
    if codes is not None:
        tcode, nt = codes
    else:
        tcode = first_seen(types.tolist())
        nt = max(tcode) + 1
        tcode = np.array(tcode, dtype=np.int64)
    ak = a * (nt + 1) + tcode.take(b)  # atom and partner type in one number
    # Classes: the number of contacts to each partner type and own type (in
    # a last column, which no contact counts into).
    cls, leader = first_seen_and_index(_rows(np.bincount(ak, minlength=npos * (nt + 1)).reshape(npos, nt + 1), tcode))
    # Groups start as the classes, numbered in order of first appearance as
    # the groups are.
    ngroup, first_pos = len(leader), leader
    label = cls = np.array(cls, dtype=np.int64)
    # (when every position is a class, each is a site of its own; without
    # contacts there are no distances to differ)
    if a.size and ngroup < npos:
        # Distances in a padded table, each atom's sorted by partner type
        # and distance (column: the contact's place among the atom's
        # contacts): within a class the rows line up.
        dd = np.concatenate([d, d])
        order = _order(ak, d, dd, npos * (nt + 1))
        a_s = a[order]
        # (each atom's first place in a_s looked up once per atom, not
        # once per contact)
        col = np.arange(a.size) - a_s.searchsorted(np.arange(npos)).take(a_s)
        width = int(np.maximum.reduce(col)) + 1
        table = np.zeros((npos, width))
        table[a_s, col] = dd[order]
        # Each atom joins the first atom of its class whose distances agree: the
        # class's first atom, or for the atoms whose distances differ from that
        # atom's, the first of the earlier atoms of the class that agrees (or
        # itself), found in blocks of up to 2e6 distance comparisons.
        lead = np.array(leader, dtype=np.int64).take(cls)
        dev = np.subtract(table, table.take(lead, 0))
        np.abs(dev, out=dev)  # (how far each distance is from its class leader's)
        # (ufunc reductions: the any() and max() methods' wrappers cost
        # more than the work on these small tables)
        if np.maximum.reduce(dev, axis=None) > ENV_TOL:  # some atoms differ from their class's first
            first = lead
            apart = (np.maximum.reduce(dev, axis=1) > ENV_TOL).nonzero()[0]
            step = max(1, 2_000_000 // (npos * width))
            for s in range(0, apart.size, step):
                f = apart[s : s + step]
                r, m = ((cls.take(f)[:, None] == cls) & (np.arange(npos) < f[:, None])).nonzero()
                if r.size * width > 1024:
                    # Rows agree only where their first distances do:
                    # comparing those first leaves fewer whole rows.
                    t0 = table[:, 0]
                    near = (np.abs(t0[m] - t0[f[r]]) <= ENV_TOL).nonzero()[0]
                    r, m = r[near], m[near]
                diff = table.take(m, 0)
                diff -= table.take(f.take(r), 0)
                np.abs(diff, out=diff)
                agree = np.maximum.reduce(diff, axis=1) <= ENV_TOL
                best = f.copy()
                np.minimum.at(best, r[agree], m[agree])
                first[f] = best
            label_list, first_pos = first_seen_and_index(first.tolist())
            ngroup = len(first_pos)
            label = np.array(label_list, dtype=np.int64)
    # Refine: the numbers of partners in each group must agree too.  There is
    # nothing to split when every position is a group of its own, nor when
    # each type is one group (the counts per group are then the counts per
    # partner type, equal within a class).
    while a.size and nt < ngroup < npos:
        # (own group in a last column, as for the classes)
        counts = np.bincount(a * (ngroup + 1) + label.take(b), minlength=npos * (ngroup + 1)).reshape(npos, ngroup + 1)
        # (stable when every row equals that of its group's first position)
        if np.logical_and.reduce(counts == counts.take(np.array(first_pos, dtype=np.int64).take(label), 0), axis=None):
            break
        label_list, first_pos = first_seen_and_index(_rows(counts, label))
        ngroup = len(first_pos)
        label = np.array(label_list, dtype=np.int64)
    # Labels count up in order of first appearance: they are the site numbers.
    # The representative is the first entry at the group's first position.
    if pos_index is None:  # each entry a position
        site, representative = label, np.array(first_pos, dtype=np.int64)
    else:
        first_entry = first_index(pos_index.tolist())  # per position
        site = label[pos_index]
        representative = np.array([first_entry[p] for p in first_pos], dtype=np.int64)
    return Sites(
        site=site,
        representative=representative,
        multiplicity=None,
        wyckoff=[None] * ngroup,
        spacegroup="",
        spacegroup_number=0,
    )


def _order(key: np.ndarray, d: np.ndarray, dd: np.ndarray, nkeys: int) -> np.ndarray:
    """Order of both ends of every contact (key: integers below nkeys, one
    per end, the ends seen from i and then from j; d: the contacts'
    distances; dd: d twice, as the ends) by key, then distance.  Ties in
    both carry equal values, so any order among them serves.  Keys of 16
    bits sort by radix; beyond a few hundred ends, sorting the distances
    first (each contact once, its two ends side by side) and then the keys
    stably beats lexsort, whose cost grows fast with the length."""
    if nkeys <= 32767:
        key = key.astype(np.int16)
        if key.size > 200:
            o = d.argsort().repeat(2)
            o[1::2] += d.size
            return o[key.take(o).argsort(kind="stable")]
    return np.lexsort((dd, key))


_VOID: dict = {}  # np.dtype((np.void, k * itemsize)) by k, for bincount's integers


def _rows(m: np.ndarray, last: np.ndarray) -> list[bytes]:
    """The rows of ``m`` (a fresh, C-contiguous bincount whose last column
    counted nothing) as bytes after ``last`` is written into that column:
    equal exactly when the rows are equal."""
    k = m.shape[1]
    m[:, k - 1] = last
    void = _VOID.get(k)
    if void is None:
        void = np.dtype((np.void, k * m.itemsize))  # (bincount gives np.intp, one size per platform)
        if len(_VOID) < 1024:
            _VOID[k] = void
    return m.view(void).ravel().tolist()
