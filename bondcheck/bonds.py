"""Bond stage: neighbour list, bond criterion, per-atom gap.

Every contact within SEARCH x (r_i + r_j) is kept with its ratio
q = d / (r_i + r_j) (covalent radii of Cordero et al., Dalton Trans. 2008,
2832). A contact counts as a bond when

* not both atoms are electropositive (s block, group 3, f block): such atoms
  give their electrons away and do not bond to each other;
* q <= MAX_RATIO; and
* q <= CORE_RATIO; or q <= EXTENDED_RATIO and q is within RELATIVE of the
  shortest contact each atom has to the other's element (a peroxide O-O at
  q = 1.17 counts; the Sb-Sb contact of NiSb, q = 1.23 behind Ni-Sb bonds at
  0.99, does not); or q is within RELATIVE of the nearest contact of both
  atoms altogether (the F-F and H-H bonds of molecular crystals, q = 1.21-1.25).
  The second shell of grey As, Sb, Bi and Te (q = 1.2-1.3 next to a first
  shell at 1.03-1.06) fails all three.

Contacts between atoms whose occupancies allow only one of them at a time
(split or mixed sites) are alternatives, not contacts. Fully occupied atoms
closer than OVERLAP angstrom make the structure unreadable.
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass

import numpy as np

from . import elements
from .record import Crystal, StructureError

CORE_RATIO = 1.15
EXTENDED_RATIO = 1.20
MAX_RATIO = 1.30
RELATIVE = 1.12
SEARCH = 1.45
OVERLAP = 0.5
# Criterion scale used to tell whether a site's count is fragile.
WOBBLE = 0.03


@dataclass(slots=True)
class Criterion:
    core: float = CORE_RATIO
    maximum: float = MAX_RATIO
    relative: float = RELATIVE

    def scaled(self, f: float) -> "Criterion":
        return Criterion(self.core * f, self.maximum * f, 1 + (self.relative - 1) * f)


@dataclass(slots=True)
class Contacts:
    """Every contact of a structure, each unordered pair (and periodic image) once.

    i, j:    atom indices; shift: (m, 3) cell shift of j; d: distance in angstrom.
    ratio:   d / (r_i + r_j).
    weight:  occ_i * occ_j, the expected number of such contacts.
    bonded:  the criterion's decision.
    fragile: the decision flips when the criterion is scaled by 1 +/- WOBBLE.
    """

    i: np.ndarray
    j: np.ndarray
    shift: np.ndarray
    d: np.ndarray
    ratio: np.ndarray
    weight: np.ndarray
    bonded: np.ndarray
    fragile: np.ndarray
    ionic_pair: np.ndarray
    # (atomic numbers, usable, per-element reference, overall reference) of
    # the relative test, kept so that another criterion can judge the same
    # contacts cheaply.
    references: tuple | None = None

    def vectors(self, crystal: Crystal) -> np.ndarray:
        """Cartesian vector from atom i to the image of atom j."""
        fr = crystal.frac[self.j] + self.shift - crystal.frac[self.i]
        return fr @ crystal.cell


_LOCAL = threading.local()


def _check_cell_list(cell: np.ndarray, cutoff: float) -> None:
    """Refuse the cells vesin's cell list cannot take.

    vesin (0.6) caps its cell list at 1e5 bins, scaling the bins per axis down
    by their ratios; for a large, flat cell (say 2500 x 2500 x 5.6 A) the thin
    axis gets 0 bins and vesin divides by zero, which kills the process.  The
    bin counts are computed here as vesin computes them.
    """
    bound = 1.0
    for x, y, z in cell.tolist():  # bins per axis are at most max(1, length / cutoff)
        bound *= max(1.0, math.sqrt(x * x + y * y + z * z) / cutoff)
    if bound <= 1e5:  # the usual case, decided cheaply
        return
    vol = abs(float(np.linalg.det(cell)))
    faces = np.linalg.norm(np.cross(cell[[1, 2, 0]], cell[[2, 0, 1]]), axis=1)
    n = [max(1.0, math.trunc(vol / f / cutoff)) for f in faces]
    if n[0] * n[1] * n[2] <= 1e5:
        return
    rxy, ryz = n[0] / n[1], n[1] / n[2]
    n2 = math.trunc(math.pow(1e5 / (rxy * ryz * ryz), 1 / 3))
    n1 = math.trunc(ryz * n2)
    if min(n2, n1, math.trunc(rxy * n1)) < 1:
        w = vol / faces
        raise StructureError(f"cell too large and flat for the neighbour search "
                             f"({w[0]:.4g} x {w[1]:.4g} x {w[2]:.4g} A between faces)")


def _neighbour_pairs(crystal: Crystal, cutoff: float):
    """Unordered pairs within cutoff: vesin, one thread (the scan parallelises
    over structures), one NeighborList object per thread reused across calls."""
    _check_cell_list(crystal.cell, cutoff)
    nl = getattr(_LOCAL, "nl", None)
    if nl is None:
        from vesin import NeighborList

        nl = _LOCAL.nl = NeighborList(cutoff=cutoff, full_list=False, n_threads=1)
    nl.cutoff = cutoff
    cell = np.ascontiguousarray(crystal.cell, dtype=np.float64)
    pts = np.ascontiguousarray(crystal.frac @ cell, dtype=np.float64)
    i, j, S, d = nl.compute(points=pts, box=cell, periodic=True, quantities="ijSd", copy=False)
    return i.astype(np.int64), j.astype(np.int64), S.astype(np.int64), d.copy()


def _references(ratio, zi, zj, i, j, n_atoms, usable, z):
    """Per contact, the criterion-independent references of the relative test:
    the shorter of the two atoms' shortest contacts to each other's element,
    and the shorter of their shortest contacts altogether."""
    present = np.zeros(128, dtype=bool)
    present[z] = True
    zs = np.flatnonzero(present)
    ne = zs.size
    lut = np.zeros(128, dtype=np.int64)
    lut[zs] = np.arange(ne)
    code_i, code_j = lut[zi], lut[zj]
    ki, kj = i * ne + code_j, j * ne + code_i
    ru = ratio[usable]
    best = np.full(n_atoms * ne, np.inf)
    np.minimum.at(best, ki[usable], ru)
    np.minimum.at(best, kj[usable], ru)
    nearest = np.full(n_atoms, np.inf)
    np.minimum.at(nearest, i[usable], ru)
    np.minimum.at(nearest, j[usable], ru)
    return np.minimum(best[ki], best[kj]), np.minimum(nearest[i], nearest[j])


def _judge(ratio, usable, ref_el, ref_all, criterion: Criterion) -> np.ndarray:
    rel = criterion.relative
    eps = 1e-9
    near_el = ratio <= ref_el * rel + eps
    near_all = ratio <= ref_all * rel + eps
    extended = criterion.core * EXTENDED_RATIO / CORE_RATIO
    ok = (ratio <= criterion.core) | (near_el & (ratio <= extended)) | near_all
    return usable & (ratio <= criterion.maximum) & ok


def decide(ratio, zi, zj, i, j, n_atoms, ionic_pair, criterion: Criterion) -> np.ndarray:
    """Apply the bond criterion to a set of contacts (arrays of equal length)."""
    if ratio.size == 0:
        return np.zeros(0, dtype=bool)
    usable = ~ionic_pair
    ref_el, ref_all = _references(ratio, zi, zj, i, j, n_atoms, usable, np.concatenate([zi, zj]))
    return _judge(ratio, usable, ref_el, ref_all, criterion)


def find_contacts(crystal: Crystal, criterion: Criterion | None = None) -> Contacts:
    criterion = criterion or Criterion()
    z = crystal.numbers
    n = z.size
    rad = elements.radii()[z]
    # The two largest radii of the elements present (the same floats and
    # the same sum as np.sort(np.unique(rad))[-2:].sum()).
    rmax = sorted(set(rad.tolist()))[-2:]
    cutoff = SEARCH * (rmax[0] + rmax[1] if len(rmax) == 2 else 2 * rmax[0])
    i, j, S, d = _neighbour_pairs(crystal, float(cutoff))
    occ = crystal.occupancy
    ratio = d / (rad[i] + rad[j])
    keep = ratio <= SEARCH
    i, j, S, d, ratio = i[keep], j[keep], S[keep], d[keep], ratio[keep]

    # Alternatives on split or mixed sites, and genuine overlaps.
    close = d < OVERLAP
    if close.any():
        full = (occ[i] + occ[j] > 1.0 + 1e-3) & close
        if full.any():
            k = int(np.flatnonzero(full)[0])
            a, b = int(i[k]), int(j[k])
            raise StructureError(
                f"atoms {crystal.label(a)} and {crystal.label(b)} are {d[k]:.2f} A apart "
                "(overlapping atoms; duplicated or misplaced site?)"
            )
    alt = (occ[i] + occ[j] <= 1.0 + 1e-3) & (close | (ratio < 0.75))
    if alt.any():
        keep = ~alt
        i, j, S, d, ratio = i[keep], j[keep], S[keep], d[keep], ratio[keep]

    ep = elements.electropositive_by_z()
    zi, zj = z[i], z[j]
    ionic_pair = ep[zi] & ep[zj]
    refs = None
    if ratio.size:
        usable = ~ionic_pair
        refs = (z, usable) + _references(ratio, zi, zj, i, j, n, usable, z)
        bonded = _judge(ratio, *refs[1:], criterion)
        lo = _judge(ratio, *refs[1:], criterion.scaled(1 - WOBBLE))
        hi = _judge(ratio, *refs[1:], criterion.scaled(1 + WOBBLE))
        fragile = lo != hi
    else:
        bonded = fragile = np.zeros(0, dtype=bool)
    return Contacts(i, j, S, d, ratio, occ[i] * occ[j], bonded, fragile, ionic_pair, refs)


def rescaled(crystal: Crystal, contacts: Contacts, criterion: Criterion) -> Contacts:
    """The same contacts judged by another criterion (no new neighbour search;
    valid for criteria whose maximum ratio stays below SEARCH)."""
    from dataclasses import replace

    c = contacts
    refs = c.references
    if refs is not None and (refs[0] is crystal.numbers or np.array_equal(refs[0], crystal.numbers)):
        bonded = _judge(c.ratio, *refs[1:], criterion)
    else:
        z = crystal.numbers
        bonded = decide(c.ratio, z[c.i], z[c.j], c.i, c.j, crystal.natoms, c.ionic_pair, criterion)
    return replace(c, bonded=bonded)



def per_atom(contacts: Contacts, n_atoms: int, occupancy: np.ndarray):
    """Per-atom coordination (occupancy weighted), nearest ratio, last bonded
    ratio, first unbonded ratio and fragility."""
    c = contacts
    both_i = np.concatenate([c.i, c.j])
    both_j = np.concatenate([c.j, c.i])
    ratio2 = np.concatenate([c.ratio, c.ratio])
    bonded2 = np.concatenate([c.bonded, c.bonded])
    usable2 = ~np.concatenate([c.ionic_pair, c.ionic_pair])
    fragile2 = np.concatenate([c.fragile, c.fragile])
    coord = np.bincount(both_i[bonded2], weights=occupancy[both_j[bonded2]], minlength=n_atoms)
    nearest = np.full(n_atoms, np.nan)
    last = np.full(n_atoms, np.nan)
    first_out = np.full(n_atoms, np.nan)
    tmp = np.full(n_atoms, np.inf)
    np.minimum.at(tmp, both_i[usable2], ratio2[usable2])
    nearest[np.isfinite(tmp)] = tmp[np.isfinite(tmp)]
    tmp = np.full(n_atoms, -np.inf)
    np.maximum.at(tmp, both_i[bonded2], ratio2[bonded2])
    last[np.isfinite(tmp)] = tmp[np.isfinite(tmp)]
    tmp = np.full(n_atoms, np.inf)
    out = usable2 & ~bonded2
    np.minimum.at(tmp, both_i[out], ratio2[out])
    first_out[np.isfinite(tmp)] = tmp[np.isfinite(tmp)]
    fragile = np.zeros(n_atoms, dtype=bool)
    fragile[both_i[fragile2]] = True
    return coord, nearest, last, first_out, fragile
