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
from dataclasses import dataclass, replace

import numpy as np

from . import elements
from .arrays import filled, first_seen, group_mean
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
    ionic_pair: both atoms electropositive (never a bond, nor a reference).
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
    # contacts cheaply, then (element code per atom, number of elements) as
    # element_codes gives them.
    references: tuple | None = None

    def element_codes(self, numbers: np.ndarray) -> tuple | None:
        """(element code per atom, an int64 array numbering the elements 0,
        1, ... in order of first appearance; number of elements) as the bond
        stage made them for the atomic numbers `numbers` (the very array), or
        None when it made none for them (no contacts, another array)."""
        refs = self.references
        if refs is None or refs[0] is not numbers:
            return None
        return refs[4], refs[5]

    def vectors(self, crystal: Crystal, select=None) -> np.ndarray:
        """Cartesian vector from atom i to the image of atom j, for every
        contact or for those that select picks (a boolean mask or an index
        array over the contacts), in the selection's order."""
        i, j, shift = self.i, self.j, self.shift
        if select is not None:
            i, j, shift = i[select], j[select], shift[select]
        fr = crystal.frac[j] + shift - crystal.frac[i]
        return fr @ crystal.cell


_LOCAL = threading.local()
# periodic in all three directions, as vesin takes it (made once, not per call)
_PERIODIC = np.ones(3, dtype=bool)
_PERIODIC.setflags(write=False)


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
    """Unordered pairs within cutoff as vesin returns them: (pairs (m, 2),
    shifts (m, 3), distances (m,)), views into the neighbour list's buffers,
    valid until its next search. vesin runs on one thread (the scan
    parallelises over structures), with one search object per thread reused
    across calls."""
    _check_cell_list(crystal.cell, cutoff)
    search = getattr(_LOCAL, "search", None)
    if search is None:
        search = _LOCAL.search = _direct_search() or _WrappedSearch()
    cell = np.ascontiguousarray(crystal.cell, dtype=np.float64)
    pts = np.ascontiguousarray(crystal.frac @ cell, dtype=np.float64)
    return search(pts, cell, cutoff)


class _WrappedSearch:
    """The search through vesin's Python wrapper, NeighborList.compute."""

    def __init__(self):
        from vesin import NeighborList

        self.nl = NeighborList(cutoff=1.0, full_list=False, n_threads=1)

    def __call__(self, points: np.ndarray, box: np.ndarray, cutoff: float):
        self.nl.cutoff = cutoff
        return self.nl.compute(points=points, box=box, periodic=_PERIODIC, quantities="PSd", copy=False)


# vesin versions whose C entry point _DirectSearch calls as their own Python
# wrapper does (checked against the wrapper's results on every corpus structure).
_DIRECT_VESIN = ("0.6.",)


def _direct_search():
    """A _DirectSearch when the installed vesin is a version it was checked
    with, else None (the wrapper is used)."""
    try:
        import vesin

        if not vesin.__version__.startswith(_DIRECT_VESIN):
            return None
        return _DirectSearch()
    except Exception:  # (a vesin laid out otherwise: its wrapper still works)
        return None


class _ArrayView:
    """Lets numpy view memory it does not own (through __array_interface__)."""

    __slots__ = ("__array_interface__",)


def _view(address: int, shape: tuple, typestr: str) -> np.ndarray:
    v = _ArrayView()
    v.__array_interface__ = {"data": (address, False), "shape": shape, "typestr": typestr, "version": 3}
    return np.asarray(v)


class _DirectSearch:
    """vesin's search through vesin_neighbors, the function of its C API that
    its Python wrapper calls, with the ctypes declarations and the library the
    package ships.  The call, its options and the buffers the pairs come back
    in are those of NeighborList.compute(..., quantities="PSd", copy=False):
    the same pairs in the same order.  What is left out is the wrapper's
    per-call work (about 18 us of the 90 us a structure's search takes): it
    copies its inputs, builds the options and ctypes pointers anew, and wraps
    each output pointer in a ctypes array type made for that number of pairs
    and never freed (the memory a long scan accumulates)."""

    def __init__(self):
        import ctypes

        import vesin
        from vesin._c_api import VesinAutoAlgorithm, VesinCPU, VesinDevice, VesinNeighborList, VesinOptions

        self._ctypes = ctypes
        self._lib = vesin.get_library()
        self._neighbors = VesinNeighborList()
        self._device = VesinDevice(VesinCPU, 0)
        o = self._options = VesinOptions()
        o.full, o.sorted, o.algorithm, o.skin, o.n_threads = False, False, VesinAutoAlgorithm, 0.0, 1
        o.return_shifts, o.return_distances, o.return_vectors = True, True, False
        self._error = ctypes.c_char_p()
        self._double = ctypes.POINTER(ctypes.c_double)
        self._periodic = _PERIODIC.ctypes.data_as(ctypes.POINTER(ctypes.c_bool))
        self._types = (np.dtype(np.uintp).str, np.dtype(np.int32).str, np.dtype(np.float64).str)
        # The neighbour list's length and buffer addresses, read as integers
        # through a view of its memory (positions from vesin's declaration):
        # cheaper than reading the ctypes fields and casting each pointer.
        word = np.dtype(np.uintp).itemsize
        fields = [getattr(VesinNeighborList, name) for name in ("length", "pairs", "shifts", "distances")]
        if ctypes.sizeof(ctypes.c_size_t) != word or any(f.size != word or f.offset % word for f in fields):
            raise TypeError("the neighbour list is laid out otherwise than expected")
        self._words = np.frombuffer(self._neighbors, dtype=np.uintp)
        self._at = np.array([f.offset // word for f in fields])

    def __del__(self):
        try:
            self._lib.vesin_free(self._neighbors)
        except Exception:  # (at interpreter exit the library may be gone)
            pass

    def __call__(self, points: np.ndarray, box: np.ndarray, cutoff: float):
        # (the C function reads the memory as rows of three doubles)
        if (box.shape != (3, 3) or points.ndim != 2 or points.shape[1] != 3 or box.dtype != np.float64
                or points.dtype != np.float64 or not (box.flags.c_contiguous and points.flags.c_contiguous)):
            raise ValueError("neighbour search needs a 3 x 3 box and n x 3 points, C-ordered float64")
        ct = self._ctypes
        self._options.cutoff = cutoff
        status = self._lib.vesin_neighbors(
            points.ctypes.data_as(self._double), points.shape[0], box.ctypes.data_as(self._double),
            self._periodic, self._device, self._options, ct.byref(self._neighbors), ct.byref(self._error))
        if status != 0:
            raise RuntimeError(self._error.value.decode("utf8"))
        m, pairs, shifts, distances = self._words[self._at].tolist()
        tp, ts, td = self._types
        if m == 0:
            return np.empty((0, 2), tp), np.empty((0, 3), ts), np.empty(0, td)
        return _view(pairs, (m, 2), tp), _view(shifts, (m, 3), ts), _view(distances, (m,), td)


def _references(ratio, i, j, numbers, usable):
    """Per contact, the criterion-independent references of the relative test:
    the shorter of the two atoms' shortest contacts to each other's element,
    and the shorter of their shortest contacts altogether; then the element
    codes they were found with (per atom, 0, 1, ... in order of first
    appearance) and the number of elements."""
    code = first_seen(numbers.tolist())  # element codes 0, 1, ... per atom
    ne = max(code) + 1
    code = np.array(code, dtype=np.int64)
    n_atoms = code.size
    m = ratio.size
    # Both ends of every contact at once (atom, partner): the first m entries
    # are the contacts seen from i, the last m seen from j.
    atom = np.concatenate((i, j))
    # best[e * n_atoms + k]: atom k's shortest usable contact to element e.
    # (Laid out element by element, the minimum over the elements runs along
    # the first axis, which numpy does row by row, rather than over the
    # short rows of each atom one at a time.)
    key = code[np.concatenate((j, i))]
    key *= n_atoms
    key += atom
    if np.count_nonzero(usable) < m:  # (cheaper than usable.all())
        ratio = np.where(usable, ratio, np.inf)  # (an unusable contact changes no minimum)
    best = filled(ne * n_atoms, np.inf)
    np.minimum.at(best, key, np.concatenate((ratio, ratio)))
    # (np.minimum.reduce(x) is x.min() without the method's Python-level wrapper)
    nearest = np.minimum.reduce(best.reshape(ne, n_atoms), axis=0)
    per_el = best[key]
    overall = nearest[atom]
    return np.minimum(per_el[:m], per_el[m:]), np.minimum(overall[:m], overall[m:]), code, ne


def _extended(core):
    """The ratio up to which a contact near the reference to the partner's
    element is bonded, for a criterion's core ratio (or a column of them)."""
    return core * EXTENDED_RATIO / CORE_RATIO


def _judge(ratio, usable, ref_el, ref_all, core, maximum, relative, extended) -> np.ndarray:
    """The criterion's decision per contact. core, maximum, relative and
    extended (:func:`_extended` of core) are a criterion's numbers, or (k, 1)
    columns of k criteria's numbers, which give k rows of decisions.

    A contact is bonded when it is usable, ratio <= maximum, and ratio <= core,
    or ratio <= extended and within relative of the reference to the partner's
    element, or within relative of the overall reference.  That is one
    comparison with a threshold: the tests joined by 'or' become a maximum,
    those joined by 'and' a minimum (both exact).  np.fmax leaves a nan out,
    as the failed comparison it stands for, and np.minimum keeps it, failing
    the comparison; so nan numbers decide as the separate comparisons would."""
    eps = 1e-9
    # (the same operations, worked in place: two new arrays for the limits,
    # not one per operation)
    limit = ref_el * relative
    limit += eps
    np.minimum(limit, extended, out=limit)
    np.fmax(core, limit, out=limit)
    limit_all = ref_all * relative
    limit_all += eps
    np.fmax(limit, limit_all, out=limit)
    np.minimum(maximum, limit, out=limit)
    bonded = ratio <= limit
    bonded &= usable
    return bonded


_WOBBLED: dict[tuple, tuple] = {}


def _wobbled(criterion: Criterion) -> tuple:
    """(core, maximum, relative, extended) as (3, 1) columns of the criterion
    and its scalings by 1 - WOBBLE and 1 + WOBBLE, for one _judge call on all
    three."""
    key = (criterion.core, criterion.maximum, criterion.relative)
    cols = _WOBBLED.get(key)
    if cols is None:
        crits = (criterion, criterion.scaled(1 - WOBBLE), criterion.scaled(1 + WOBBLE))
        cols = tuple(np.array([[getattr(c, k)] for c in crits]) for k in ("core", "maximum", "relative"))
        cols += (_extended(cols[0]),)
        if len(_WOBBLED) < 64:
            _WOBBLED[key] = cols
    return cols


def find_contacts(crystal: Crystal, criterion: Criterion | None = None) -> Contacts:
    criterion = criterion or Criterion()
    z = crystal.numbers
    rad = elements.radii()[z]
    # The two largest radii of the elements present (the same floats and
    # the same sum as np.sort(np.unique(rad))[-2:].sum()).
    rmax = sorted(set(rad.tolist()))[-2:]
    cutoff = SEARCH * (rmax[0] + rmax[1] if len(rmax) == 2 else 2 * rmax[0])
    pairs, shifts, d = _neighbour_pairs(crystal, float(cutoff))
    # vesin's indices are size_t: read as the signed integers of that size
    # (the same values, and faster to index with).
    pairs = pairs.view(np.intp)
    i, j = pairs[:, 0], pairs[:, 1]
    ratio = d / (rad[i] + rad[j])
    keep = (ratio <= SEARCH).nonzero()[0]
    i, j, S, d, ratio = i[keep], j[keep], shifts.take(keep, 0).astype(np.int64), d[keep], ratio[keep]

    # Alternatives on split or mixed sites, and genuine overlaps.
    occ = crystal.occupancy
    close = None  # (when no distance is below OVERLAP, no contact is close)
    if d.size and not np.minimum.reduce(d) >= OVERLAP:
        close = d < OVERLAP
        full = (occ[i] + occ[j] > 1.0 + 1e-3) & close
        if full.any():
            k = int(np.flatnonzero(full)[0])
            a, b = int(i[k]), int(j[k])
            raise StructureError(
                f"atoms {crystal.label(a)} and {crystal.label(b)} are {d[k]:.2f} A apart "
                "(overlapping atoms; duplicated or misplaced site?)"
            )
    # Alternatives need two occupancies adding up to 1 at most: there are
    # none when every occupancy is above one half.
    if 2 * np.minimum.reduce(occ) <= 1.0 + 1e-3:
        near = ratio < 0.75 if close is None else close | (ratio < 0.75)
        alt = (occ[i] + occ[j] <= 1.0 + 1e-3) & near
        if alt.any():
            keep = ~alt
            i, j, S, d, ratio = i[keep], j[keep], S.compress(keep, 0), d[keep], ratio[keep]

    ep = elements.electropositive_by_z()[z]
    ionic_pair = ep[i] & ep[j]
    refs = None
    if ratio.size:
        usable = ~ionic_pair
        refs = (z, usable) + _references(ratio, i, j, z, usable)
        judged = _judge(ratio, *refs[1:4], *_wobbled(criterion))
        bonded = judged[0]
        fragile = judged[1] != judged[2]
    else:
        bonded = fragile = np.zeros(0, dtype=bool)
    return Contacts(i, j, S, d, ratio, occ[i] * occ[j], bonded, fragile, ionic_pair, refs)


def rescaled(crystal: Crystal, contacts: Contacts, criterion: Criterion) -> Contacts:
    """The same contacts judged by another criterion (no new neighbour search;
    valid for criteria whose maximum ratio stays below SEARCH)."""
    c = contacts
    refs = c.references
    if refs is None or not (refs[0] is crystal.numbers or np.array_equal(refs[0], crystal.numbers)):
        usable = ~c.ionic_pair
        refs = (crystal.numbers, usable) + _references(c.ratio, c.i, c.j, crystal.numbers, usable)
    bonded = _judge(c.ratio, *refs[1:4], criterion.core, criterion.maximum, criterion.relative,
                    _extended(criterion.core))
    return replace(c, bonded=bonded)


def per_atom(contacts: Contacts, n_atoms: int, occupancy: np.ndarray, group: np.ndarray, counts: np.ndarray):
    """Per group of atoms (`group`: an int array numbering each atom's group
    0..g-1; `counts`: atoms per group), the values the per-atom coordination
    (occupancy weighted), nearest ratio, last bonded ratio, first unbonded
    ratio (NaN where an atom has no such contact) and fragility give the
    group: the mean coordination (arrays.group_mean), the smallest nearest
    and first unbonded ratio, the largest last bonded ratio, and whether any
    atom of the group is fragile.  The group values come from the contacts
    directly, without per-atom values on the way, except the coordination
    when some occupancy is not 1: that is summed per atom first, as the mean
    of the per-atom values adds it."""
    c = contacts
    ng = counts.size
    # Both ends of every contact: atom, its group, ratio, bonded.
    ends = np.concatenate((c.i, c.j))
    group2 = group[ends]
    ratio2 = np.concatenate((c.ratio, c.ratio))
    bonded2 = np.concatenate((c.bonded, c.bonded))
    bonded_group = group2[bonded2]
    if not np.count_nonzero(occupancy != 1.0):
        # Every occupancy 1: an atom's coordination is its number of bonds,
        # and the sum over a group the group's number of bond ends.
        coord = np.bincount(bonded_group, minlength=ng) / counts
    else:
        partner = np.concatenate((c.j, c.i))
        atom_coord = np.bincount(ends[bonded2], weights=occupancy[partner[bonded2]], minlength=n_atoms)
        crowded = (counts >= 8).nonzero()[0].tolist()
        coord = group_mean(atom_coord, group, counts, crowded)
    last = filled(ng, np.nan)
    np.fmax.at(last, bonded_group, ratio2[bonded2])
    nearest = filled(ng, np.nan)
    if np.count_nonzero(c.ionic_pair):
        usable2 = ~np.concatenate((c.ionic_pair, c.ionic_pair))
        np.fmin.at(nearest, group2[usable2], ratio2[usable2])
        out = usable2 & ~bonded2
    else:
        np.fmin.at(nearest, group2, ratio2)
        out = ~bonded2
    first_out = filled(ng, np.nan)
    np.fmin.at(first_out, group2[out], ratio2[out])
    fragile = np.zeros(ng, dtype=bool)
    (picked,) = c.fragile.nonzero()
    if picked.size:
        fragile[group[c.i[picked]]] = True
        fragile[group[c.j[picked]]] = True
    return coord, nearest, last, first_out, fragile
