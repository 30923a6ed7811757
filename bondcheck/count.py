"""Count stage: split into cations and anions, count electrons, compare with the
generalized 8-N rule, and try to close the count.

For cations C_m and anions A_n with valence electrons e_C, e_A:

    VEC_A = (m e_C + n e_A) / n
    8 - VEC_A = AA - CC

AA: anion-anion bonds per anion (bond ends, i.e. the mean number of anion
neighbours an anion has); CC: electrons per anion that stay on cations
(cation-cation bonds, lone pairs, nonbonding d electrons). The residual

    residual = VEC_A - 8 + AA_obs - CC_obs

is what the observed bonds leave unexplained, in electrons per anion: positive
electrons must stay on cations (lone pairs, d electrons) or are in excess;
negative electrons are missing (multiple bonds, a missing atom). Hydrogen and
helium complete a shell at 2 instead of 8.

Everything is counted per cell and weighted by occupancy, then divided by the
number of anions.
"""
from __future__ import annotations

import math
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from functools import lru_cache

import numpy as np

from . import elements
from .arrays import filled, group_mean
from .bonds import Contacts
from .record import Crystal
from .symmetry import Sites

TOL = 0.01  # electrons per anion, for closing the count
# Pauling, J. Am. Chem. Soc. 69, 542 (1947): d(n) = d(1) - 0.60 log10 n.
PAULING_K = 0.60
DOUBLE_ORDER = 1.3  # bond order from length above which a double bond is allowed
TRIPLE_ORDER = 2.5
# A cation-cation contact is a bond only when it is not much longer than the
# cations' own bonds to anions (edge- and face-sharing polyhedra put cations
# close without bonding them): common practice, no source.
CC_BRIDGE = 1.25
# Bonds this short (ratio d/(r_i + r_j)) are covalent; a p-block cation with
# four of them, near-equal, has no lone pair (common practice, no source).
SATURATED_RATIO = 1.06
# A further anion element is tried only while its electronegativity is within
# this step of the previous one (S -> As in cobaltite, Ge -> Ga in a clathrate,
# F -> O in an oxyfluoride; not O -> P or O -> Al).
SPLIT_STEP = 0.6
# Most electronegative metal accepted as an anion when no p-block element is
# present (aurides, platinides).
METAL_ANION_EN = 2.2
# Per-thread memory of the last structure's static quantities and of recent
# searches for closing totals.
_LOCAL = threading.local()


def target(sym: str) -> int:
    return 2 if sym in ("H", "He") else 8


@dataclass(slots=True)
class Closure:
    """How the count closes (or fails to)."""

    closes: bool
    keep: dict[int, float] = field(default_factory=dict)  # group -> electrons kept per atom
    pi_electrons: float = 0.0
    pi_from_short: float = 0.0
    pi_from_planar: float = 0.0
    mixed_groups: list[int] = field(default_factory=list)
    cost: float = 0.0


@dataclass(slots=True)
class Count:
    anions: list[str]
    cations: list[str]
    reason: str
    n_anion: float
    electrons: float
    vec_anion: float
    aa_predicted: float
    aa_observed: float
    cc_observed: float
    residual: float
    role: np.ndarray  # per atom: True for anions
    aa_bonds: np.ndarray  # per atom: anion-anion bonds (anions) or cation-cation bonds (cations)
    cc_bond: np.ndarray  # per contact: counted cation-cation bond
    aa_bond: np.ndarray  # per contact: anion-anion bond
    groups: list[tuple[int, int]]  # (site, Z) per group
    group_of: np.ndarray  # per atom
    closure: Closure
    valid: bool = True
    note: str = ""


@dataclass(slots=True)
class _Split:
    """What closing the count of one anion set needs."""

    anion_z: set[int]  # atomic numbers of the anions
    role: np.ndarray  # per atom: True for anions
    aa: np.ndarray  # per bond: anion-anion
    ca: np.ndarray  # per bond: cation-anion
    per: np.ndarray  # per atom: homonuclear-role bonds (as Count.aa_bonds)
    cc_any: bool  # some cation-cation bond counts
    four: bool = False  # the groups of _Static.four_z count four electrons (see _group_options)


@lru_cache(maxsize=4096)
def _candidates(zs: tuple[int, ...]) -> tuple[tuple[tuple[str, ...], str], ...]:
    """Anion sets to try for the elements zs (sorted atomic numbers), in
    order: the most electronegative anion-capable element, then the next
    ones added in order of electronegativity; each with why."""
    syms = elements.symbols()
    return tuple((tuple(an), why) for an, why in _candidate_list([syms[z] for z in zs]))


def _candidate_list(present: list[str]) -> list[tuple[list[str], str]]:
    en = elements.pauling()
    nums = elements.numbers()
    order = sorted(present, key=lambda s: -en[nums[s]])
    capable = [s for s in order if elements.can_be_anion(s)]
    if len(present) == 1:
        return [(present, "a single element: every atom counts as an anion (8-N rule for elements)")]
    if not capable:
        top = order[0]
        if en[nums[top]] >= METAL_ANION_EN and any(elements.is_electropositive(s) for s in present):
            return [([top], f"no p-block element; {top} is the most electronegative (metal anion)")]
        return []
    out = []
    for k in range(1, len(capable) + 1):
        anions = capable[:k]
        if k > 1 and en[nums[anions[-2]]] - en[nums[anions[-1]]] > SPLIT_STEP:
            break
        if k == 1:
            why = f"{anions[0]} is the most electronegative element that can be an anion"
        else:
            why = f"anions {', '.join(anions)}: the {k} most electronegative anion-capable elements"
        out.append((anions, why))
    return out


def count(
    crystal: Crystal,
    contacts: Contacts,
    sites: Sites,
    anions: list[str] | None = None,
    valence: dict[str, int] | None = None,
) -> Count | None:
    """Count electrons. Returns None when there is nothing to count (no element
    can take the anion role)."""
    valence = valence or {}
    ctx = _Context(crystal, contacts, sites, valence)
    if anions:
        missing = [a for a in anions if a not in ctx.static.present]
        if missing:
            from .record import StructureError

            raise StructureError(f"--anions names {', '.join(missing)}, not present in {crystal.name or 'the structure'}")
        return ctx.evaluate(list(anions), "set by the user (--anions)")
    candidates = ctx.static.candidates  # ((anion symbols), why) per split, from _candidates
    if not candidates:
        return None
    tried = []
    # A closure that needs an implausible split does not count as closing, so
    # none is looked for (close_invalid=False).
    for an, why in candidates:
        c = ctx.evaluate(an, why, close_invalid=False)
        tried.append(c)
        # Costs are never negative and the candidates grow one anion element
        # at a time, so a valid closure of cost 0 is the choice below: the
        # further splits need not be counted.
        if c.valid and c.closure.closes and round(c.closure.cost, 6) == 0:
            break
    closing = [c for c in tried if c.valid and c.closure.closes]
    if closing:
        # Cheapest closure (fewest unusual oxidation states and lone pairs);
        # among equals the smallest anion set.
        best = min(closing, key=lambda c: (round(c.closure.cost, 6), len(c.anions)))
        if len(candidates) > 1:
            best.reason += "; of the splits tried, the simplest that closes the count"
        return best
    # Nothing closes: report the natural polyanion split.
    an, why = ctx.polyanion_split(candidates[0][0])
    for c in tried:
        if c.anions == an:
            c.reason = why
            break
    else:
        c = ctx.evaluate(an, why, close_invalid=False)
    return c


def same_count(crystal: Crystal, contacts: Contacts, bonded: np.ndarray, anions: list[str] | None = None) -> bool:
    """True when count() of the contacts judged as `bonded` (another
    criterion's bonds over the same contacts) is provably the count of the
    contacts as given, in everything but the per-bond arrays: the same
    split, residual, validity and closure. False when that is not shown
    (the counts may still agree).

    Call an element a fixed cation when it cannot be an anion and is in no
    candidate anion set (the user's set, when given): it is a cation in
    every split count() evaluates, as the polyanion split only adds
    anion-capable elements. Every contact whose bond differs must have a
    fixed cation x at one end; at the other end y:

    * y a fixed cation too: the contact is never anion-anion nor
      cation-anion; it could be a cation-cation bond only when neither is
      electropositive, and then it must fail the bridging test whatever the
      split (below).
    * otherwise it is never anion-anion, and a cation-anion bond in the
      splits where y is an anion: it must be longer than a saturating bond
      (SATURATED_RATIO), and when x is not electropositive, each
      cation-cation candidate at x must fail the bridging test whatever the
      split (x's mean cation-anion length, which that test reads, changes).
      x cannot be anion-capable, so its having no anion neighbour changes no
      validity.

    Then no split gains or loses an anion-anion or cation-cation bond: the
    bond counts, per-atom values, validity, saturated cations and pi
    capacity of every split are those of the given bonds (the bonds that
    enter them are the same, in the same order). Nor does the polyanion
    split change: a pair of elements with a fixed cation neither adds that
    element (not anion-capable) nor, as it is never an anion, adds its
    partner or makes it bonded to an anion. The candidates then count and
    are chosen as before.

    The bridging test fails for a contact of length d at atoms e, f in
    every split when d > CC_BRIDGE * min(L_e, L_f), L_e the longest of e's
    bonds (in either set of bonds) to atoms that are not fixed cations,
    taken only when e has a bond in both to an atom of the first candidate
    set: e's mean cation-anion length is then at most L_e in every split
    (a small factor covers the rounding of the mean)."""
    given = contacts.bonded
    changed = np.flatnonzero(bonded != given)
    if not changed.size:
        return True
    z = crystal.numbers
    zs = tuple(sorted(set(z.tolist())))
    sets = _fixed_cations(zs, tuple(anions) if anions else None)
    if sets is None:
        return not anions  # no candidate: nothing to count either way; a set count() refuses
    fixed, first, fixed_z, first_z = sets
    i, j, d = contacts.i, contacts.j, contacts.d
    ci, cj = i[changed], j[changed]
    # The changed contacts, a few: each looked at in turn.
    check = []  # contacts that must fail the bridging test
    x_may = []  # cation ends x that may bond to another cation
    for k, a, b, za, zb, r in zip(changed.tolist(), ci.tolist(), cj.tolist(), z[ci].tolist(), z[cj].tolist(),
                                  contacts.ratio[changed].tolist()):
        fa, fb = za in fixed, zb in fixed
        if fa and fb:
            if za in _NOT_EP_Z and zb in _NOT_EP_Z:
                check.append(k)
        elif fa or fb:
            if r <= SATURATED_RATIO:
                return False
            x, zx = (a, za) if fa else (b, zb)
            if zx in _NOT_EP_Z:
                x_may.append(x)
        else:
            return False
    if not check and not x_may:
        return True
    union = bonded | given
    rows = np.flatnonzero(union)
    ui, uj = i[rows], j[rows]
    zi, zj = z[ui], z[uj]
    n = len(z)
    if x_may:
        # Cations that may bond to each other in the first split (in any
        # other, a subset of them), and the candidates among them at x.
        may_z = _NOT_EP_BY_Z & ~first_z
        at_x = np.zeros(n, dtype=bool)
        at_x[x_may] = True
        near_x = (at_x[ui] | at_x[uj]) & may_z[zi] & may_z[zj]
        check += rows[near_x].tolist()
    # L per end atom of the contacts to check (inf when not anchored): each
    # bond of the union near them, from either end.
    check = np.array(check, dtype=np.intp)
    pi, pj = i[check], j[check]
    at = np.zeros(n, dtype=bool)
    at[pi] = True
    at[pj] = True
    sel = np.flatnonzero(at[ui] | at[uj])
    end = np.concatenate((ui[sel], uj[sel]))
    other = np.concatenate((zj[sel], zi[sel]))
    rs = rows[sel]
    dd = np.concatenate((d[rs], d[rs]))
    kept = given[rs] & bonded[rs]
    kept = np.concatenate((kept, kept))
    use = at[end] & ~fixed_z[other]
    end, other, dd, kept = end[use], other[use], dd[use], kept[use]
    longest = np.zeros(n)
    np.maximum.at(longest, end, dd)
    anchored = np.zeros(n, dtype=bool)
    anchored[end[kept & first_z[other]]] = True
    limit = np.where(anchored, longest, np.inf)
    bound = CC_BRIDGE * np.minimum(limit[pi], limit[pj]) * (1 + 1e-9)
    return bool(np.count_nonzero(d[check] > bound) == check.size)


@lru_cache(maxsize=1024)
def _fixed_cations(zs: tuple[int, ...], anions: tuple[str, ...] | None):
    """(fixed cations, first anion set) as sets of atomic numbers, then the
    same two as read-only masks by atomic number, for `same_count`: the
    elements present that cannot be anions and are in no candidate set, or
    not in the user's set; None when there is no candidate or the user's set
    names an element not present."""
    nums = elements.numbers()
    if anions:
        if not all(a in nums for a in anions):
            return None
        every = first = frozenset(nums[a] for a in anions)
        if not every <= set(zs):
            return None
    else:
        cands = _candidates(zs)
        if not cands:
            return None
        first = frozenset(nums[a] for a in cands[0][0])
        every = frozenset(nums[a] for an, _why in cands for a in an)
    fixed = frozenset(k for k in zs if k not in _CAPABLE_Z and k not in every)
    masks = []
    for members in (fixed, first):
        m = np.zeros(_CAPABLE_BY_Z.size, dtype=bool)
        m[list(members)] = True
        m.setflags(write=False)
        masks.append(m)
    return fixed, first, masks[0], masks[1]


# target() by atomic number: electrons that complete the shell.
_TARGET_BY_Z = np.array([float(target(sym)) for sym in elements.symbols()])
_TARGET_BY_Z.setflags(write=False)
# Per-element facts as plain Python sets and lists, so that a structure's
# static quantities need no numpy scalar look-ups.
_SYMBOLS = elements.symbols()
_CAPABLE_Z = frozenset(np.flatnonzero(elements.capable_by_z()).tolist())
_NOT_EP_Z = frozenset(np.flatnonzero(~elements.electropositive_by_z()).tolist())
_PAULING = elements.pauling_list()
_VALENCE = elements.valence_by_z().tolist()
_TARGET = _TARGET_BY_Z.tolist()
_CAPABLE_BY_Z = elements.capable_by_z()
_NOT_EP_BY_Z = ~elements.electropositive_by_z()
_NOT_EP_BY_Z.setflags(write=False)
# (Z, symbol, block) per atomic number, as a group's element in `_Static`.
_GROUP_ELEMENT = {k: (k, sym, elements.block(sym)) for k, sym in enumerate(_SYMBOLS) if k}


@dataclass(slots=True)
class _Static:
    """The quantities of a count that depend on the atoms and sites alone."""

    present: list[str]  # element symbols, sorted
    electrons: float  # valence electrons per cell
    capable_atom: np.ndarray  # per atom: the element can be an anion
    capable_z: frozenset[int]  # atomic numbers of such elements
    not_ep_atom: np.ndarray  # per atom: the element is not electropositive
    not_ep_z: frozenset[int]  # atomic numbers of such elements
    group_of: np.ndarray  # per atom: group index
    groups: list[tuple[int, int]]  # (site, Z) per group
    group_elements: list[tuple[int, str, str]]  # (Z, symbol, block) per group
    group_weight: list[float]  # occupancy per group
    group_size: np.ndarray  # atoms per group
    occ_target: np.ndarray | None  # per atom: occupancy times the shell target (not when full)
    candidates: tuple  # `_candidates` of the elements present
    # Every occupancy is 1 (the rule): sums of occupancies over atoms are then
    # whole numbers, exact in any order, and are taken as counts of atoms.
    full: bool
    z_count: list[int]  # atoms per atomic number
    # Ce, Pr, Tb present whose valence the user did not set (atomic numbers),
    # and the electrons beyond `electrons` they give as 4+ cations (one per
    # atom, by occupancy): see _group_options.
    four_z: frozenset = frozenset()
    fourth: float = 0.0


def _static(crystal: Crystal, sites: Sites, valence: dict[str, int]) -> _Static:
    """The `_Static` of a structure, remembered for the last structure (per
    thread): the checks of one structure count it several times with other
    contacts."""
    z, occ, site = crystal.numbers, crystal.occupancy, sites.site
    # The arrays' bytes (with their types) and the valence overrides.
    key = (
        z.dtype.str, z.tobytes(), occ.dtype.str, occ.tobytes(), site.dtype.str, site.tobytes(),
        tuple(sorted(valence.items())),
    )
    last = getattr(_LOCAL, "static", None)
    if last is not None and last[0] == key:
        return last[1]
    zset = set(z.tolist())
    present = sorted([_SYMBOLS[k] for k in zset])
    z_count = np.bincount(z).tolist()
    full = not np.count_nonzero(occ != 1.0)
    if full and not valence:
        electrons = float(sum(z_count[k] * _VALENCE[k] for k in zset))
    else:
        val = elements.valence_by_z()
        if valence:
            val = val.copy()
            for el, n in valence.items():
                val[elements.numbers()[el]] = n
        electrons = float((occ * val[z]).sum())
    capable_atom = _CAPABLE_BY_Z[z]
    # Atoms that are not electropositive (the only cations that may bond to each other).
    not_ep_atom = _NOT_EP_BY_Z[z]
    capable_z = _CAPABLE_Z & zset
    not_ep_z = _NOT_EP_Z & zset
    # Groups: one per (site, element), in order of site, then element.
    gkey = site.astype(np.int64, copy=False) * 128 + z
    uniq = sorted(set(gkey.tolist()))
    group_of = np.searchsorted(np.array(uniq), gkey)  # keys are unique and sorted
    groups = [(k // 128, k % 128) for k in uniq]
    group_elements = [_GROUP_ELEMENT[zz] for _site, zz in groups]
    group_size = np.bincount(group_of, minlength=len(uniq))
    if full:
        group_weight = [float(k) for k in group_size.tolist()]
        occ_target = None
    else:
        group_weight = np.bincount(group_of, weights=occ, minlength=len(uniq)).tolist()
        occ_target = occ * _TARGET_BY_Z[z]
    # Every Count of the structure hands out group_of: read-only, so that no
    # caller can change the remembered one.
    group_of.setflags(write=False)
    four_z = frozenset(k for k in _TETRAVALENT_Z & zset if _SYMBOLS[k] not in valence)
    fourth = 0.0
    if four_z:
        fourth = float(sum(z_count[k] for k in four_z)) if full else float(occ[np.isin(z, list(four_z))].sum())
    out = _Static(
        present, electrons, capable_atom, capable_z, not_ep_atom, not_ep_z,
        group_of, groups, group_elements, group_weight, group_size, occ_target,
        _candidates(tuple(sorted(zset))), full, z_count, four_z, fourth,
    )
    _LOCAL.static = (key, out)
    return out


class _Context:
    """Per-structure quantities shared by the candidate partitions."""

    __slots__ = (
        "crystal", "contacts", "valence_override", "occ", "static", "bonded", "bi", "bj", "_bw", "_bd",
    )

    def __init__(self, crystal: Crystal, contacts: Contacts, sites: Sites, valence: dict[str, int]):
        self.crystal = crystal
        self.contacts = contacts
        self.valence_override = valence
        self.occ = crystal.occupancy
        self.static = _static(crystal, sites, valence)
        c = contacts
        self.bonded = c.bonded
        self.bi, self.bj = c.i[c.bonded], c.j[c.bonded]
        # Contact weights are occupancy products (Contacts.weight): with whole
        # atoms, the rule, every weight is 1, sums of bond weights are counts,
        # and the weights of the bonds are not needed.
        self._bw = None if self.static.full else c.weight[c.bonded]
        self._bd = None

    @property
    def bd(self) -> np.ndarray:
        """Bond lengths of the bonds, taken on first use (some counts need none)."""
        if self._bd is None:
            self._bd = self.contacts.d[self.bonded]
        return self._bd

    def polyanion_split(self, start: tuple[str, ...]) -> tuple[list[str], str]:
        """Grow the anion set by elements bonded to anions with a small
        electronegativity difference (< 0.5): a Ga-Ge framework, As-S pairs."""
        nums = elements.numbers()

        def near(a: int, b: int) -> bool:
            # Only pairs of different elements, close in electronegativity, one
            # of them anion-capable, can bring in an anion.
            return a != b and abs(_PAULING[a] - _PAULING[b]) < 0.5 and (a in _CAPABLE_Z or b in _CAPABLE_Z)

        anions = list(start)
        an_z = {nums[a] for a in anions}
        present_z = [nums[sy] for sy in self.static.present]
        can_grow = any(near(a, b) for a in present_z for b in present_z if a < b)
        outside = [sy for sy in self.static.present if sy not in anions and nums[sy] in _CAPABLE_Z]
        # The element pairs of the bonds, each once, in order of first bond:
        # the growth below depends only on which pairs occur and on that order
        # (a later bond of the same pair can add nothing), and a structure has
        # far fewer pairs than bonds. Taken only when some pair of the
        # elements present could grow the set, or an anion-capable element
        # outside it could be left without an anion neighbour.
        if can_grow or outside:
            z = self.crystal.numbers
            pairs = list(dict.fromkeys(zip(z[self.bi].tolist(), z[self.bj].tolist())))
        if can_grow:
            grow = [(a, b) for a, b in pairs if near(a, b)]  # met in bond order
            changed = True
            while changed:
                changed = False
                for a, b in grow:
                    if a in an_z and b not in an_z:
                        y = b
                    elif b in an_z and a not in an_z:
                        y = a
                    else:
                        continue
                    if y in _CAPABLE_Z:
                        anions.append(_SYMBOLS[y])
                        an_z.add(y)
                        changed = True
        # Anion-capable elements with no bond to any anion are isolated anions
        # (Cl- beside water molecules), not cations.
        loose = [sy for sy in outside if sy not in anions]
        if loose:
            bonded_to_anion = {b for a, b in pairs if a in an_z} | {a for a, b in pairs if b in an_z}
            anions += [sy for sy in loose if nums[sy] not in bonded_to_anion]
        if anions == list(start):
            return anions, f"{anions[0]} is the most electronegative element that can be an anion; no split closes the count"
        return anions, (
            f"anions {', '.join(anions)}: {start[0]} and the elements bonded to it with an "
            "electronegativity difference below 0.5; no split closes the count"
        )

    def evaluate(self, anions: list[str] | tuple[str, ...], why: str, close_invalid: bool = True) -> Count:
        """The count of one anion set. close_invalid: look for a closure of an
        implausible split too (the user's anion set is reported as it
        counts); without it such a split gets Closure(False) at once, as among
        the candidates an implausible split never counts as closing."""
        cr = self.crystal
        z = cr.numbers
        nums = elements.numbers()
        anion_z = {nums[a] for a in anions}
        an_z = np.zeros(128, dtype=bool)
        for k in anion_z:
            an_z[k] = True
        role = an_z[z]
        occ = self.occ
        n = len(z)
        bi, bj, bw = self.bi, self.bj, self._bw
        rbi, rbj = role[bi], role[bj]
        aa = rbi & rbj
        ca = rbi != rbj
        # Cation-cation bonds: between non-electropositive cations, and only
        # as long as the bridging test below allows.
        if self.static.not_ep_z <= anion_z:
            cc = np.zeros(len(bi), dtype=bool)
            cc_any = False
        else:
            may_bond = ~role & self.static.not_ep_atom
            cc = may_bond[bi] & may_bond[bj]
            cc_any = bool(np.count_nonzero(cc))
        lonely_possible = not self.static.capable_z <= anion_z
        if cc_any or lonely_possible:
            ica, jca = bi[ca], bj[ca]
            dcnt = np.bincount(ica, minlength=n) + np.bincount(jca, minlength=n)
        if cc_any:
            # Mean cation-anion bond length per atom, for the bridging test.
            dca = self.bd[ca]
            dsum = np.bincount(ica, weights=dca, minlength=n) + np.bincount(jca, weights=dca, minlength=n)
            mean_ca = np.where(dcnt > 0, dsum / np.maximum(dcnt, 1), np.inf)
            cc &= self.bd <= CC_BRIDGE * np.minimum(mean_ca[bi], mean_ca[bj])
            cc_any = bool(np.count_nonzero(cc))

        # Per-atom homonuclear-role bonds: anion-anion for anions, cation-cation
        # for cations (the cation-cation ends only when some count).
        ia, ja = bi[aa], bj[aa]
        if cc_any:
            ic, jc = bi[cc], bj[cc]
            ends, partner = [ia, ja, ic, jc], [ja, ia, jc, ic]
        else:
            ends, partner = [ia, ja], [ja, ia]
        ends = np.concatenate(ends)
        st = self.static
        if st.full:
            # Whole atoms: the sums over atoms are counts (see _Static.full),
            # and so are the sums of bond weights (every weight 1).
            n_anion = float(sum([st.z_count[k] for k in anion_z]))
            shell = float(sum([st.z_count[k] * _TARGET[k] for k in anion_z]))
            per = np.bincount(ends, minlength=n)
            if ends.size:  # floats, as bincount with weights gives them (integer zeros with nothing to add)
                per = per.astype(np.float64)
            aa_ends = 2.0 * int(np.count_nonzero(aa))
            cc_e = 2.0 * int(np.count_nonzero(cc)) if cc_any else 0.0
        else:
            n_anion = float(occ[role].sum())
            shell = float(st.occ_target[role].sum())
            per = np.bincount(ends, weights=occ[np.concatenate(partner)], minlength=n)
            aa_ends = 2.0 * float(bw[aa].sum())
            cc_e = 2.0 * float(bw[cc].sum()) if cc_any else 0.0
        electrons = st.electrons
        four = bool(st.four_z) and anion_z <= _FOUR_PLUS_ANION_Z
        if four:
            electrons += st.fourth  # Ce, Pr, Tb with four (see _group_options)
        vec = electrons / n_anion
        mean_target = shell / n_anion
        aa_obs = aa_ends / n_anion
        cc_obs = cc_e / n_anion
        residual = vec - mean_target + aa_obs - cc_obs

        # Validity: a p-block cation bonded to another cation of a different
        # element should rather be an anion.
        valid, note = True, ""
        if cc_any:
            # Each element pair once, in order of its first bond: the first
            # offending bond is the first bond of the first offending pair.
            for a, b in dict.fromkeys(zip(z[ic].tolist(), z[jc].tolist())):
                if a == b:
                    continue
                more = a if _PAULING[a] > _PAULING[b] else b
                if more in _CAPABLE_Z:
                    valid = False
                    note = f"{_SYMBOLS[more]} is left as a cation bonded to {_SYMBOLS[b if more == a else a]}"
                    break
        if valid and lonely_possible:
            # An element that could be an anion, made a cation without a
            # single bond to an anion (Cl in a hydrate split on O alone).
            lonely = ~role & (dcnt == 0) & self.static.capable_atom
            if np.count_nonzero(lonely):
                valid = False
                sym = _SYMBOLS[int(z[np.flatnonzero(lonely)[0]])]
                note = f"{sym} would be a cation without anion neighbours"

        if valid or close_invalid:
            closure = self._close(_Split(anion_z, role, aa, ca, per, cc_any, four), residual * n_anion + cc_e, n_anion)
        else:
            closure = Closure(False)
        cations = [s for s in self.static.present if s not in anions]
        return Count(
            anions=list(anions),
            cations=cations,
            reason=why,
            n_anion=n_anion,
            electrons=electrons,
            vec_anion=vec,
            aa_predicted=mean_target - vec,
            aa_observed=aa_obs,
            cc_observed=cc_obs,
            residual=residual,
            role=role,
            aa_bonds=per,
            cc_bond=cc,
            aa_bond=aa,
            groups=self.static.groups,
            group_of=self.static.group_of,
            closure=closure,
            valid=valid,
            note=note,
        )

    # -- closing the count -------------------------------------------------
    def _pi_capacity(self, split: _Split) -> tuple[float, float]:
        """Electrons that pi bonding could supply: 1 per planar three-bonded
        anion, and 2 per extra bond order at short anion-anion contacts
        between other anions."""
        role, per = split.role, split.per
        ab = np.flatnonzero(split.aa)  # the anion-anion bonds, in bond order
        if not ab.size:
            return 0.0, 0.0  # no anion has an anion neighbour
        c = self.contacts
        bi, bj = self.bi[ab], self.bj[ab]
        n = self.crystal.natoms
        planar_atom = np.zeros(n, dtype=bool)
        three = role & (np.abs(per - 3.0) < 1e-6)
        if np.count_nonzero(three):
            vec = c.vectors(self.crystal, c.bonded)[ab]
            # Each such anion's anion-anion bonds, in bond order, as vectors
            # pointing away from it (a bond to its own image once, from its
            # first end).
            at_i = three[bi]
            at_j = three[bj] & (bi != bj)
            atom = np.concatenate([bi[at_i], bj[at_j]])
            order = np.lexsort((np.concatenate([np.flatnonzero(at_i), np.flatnonzero(at_j)]), atom))
            atom = atom[order]
            rows = np.concatenate([vec[at_i], -vec[at_j]])[order]
            # The anions with exactly three such bonds, and where their rows start.
            first = np.flatnonzero(np.concatenate([[True], atom[1:] != atom[:-1]]))
            size = np.diff(np.append(first, atom.size))
            start = first[size == 3]
            if start.size:
                v0 = rows[start]
                d1, d2 = v0 - rows[start + 1], v0 - rows[start + 2]
                # The cross product of d1 and d2, the same products and differences as np.cross.
                normal = np.stack([
                    d1[:, 1] * d2[:, 2] - d1[:, 2] * d2[:, 1],
                    d1[:, 2] * d2[:, 0] - d1[:, 0] * d2[:, 2],
                    d1[:, 0] * d2[:, 1] - d1[:, 1] * d2[:, 0],
                ], axis=1)
                for t, k in enumerate(atom[start].tolist()):
                    # The length as np.linalg.norm gives it: the square root of
                    # the vector's dot product with itself.
                    nn = math.sqrt(normal[t].dot(normal[t]))
                    if nn > 1e-9 and abs(np.dot(v0[t], normal[t] / nn)) < 0.15:
                        planar_atom[k] = True
        rad = elements.radii()
        z = self.crystal.numbers
        order = 10.0 ** ((rad[z[bi]] + rad[z[bj]] - self.bd[ab]) / PAULING_K)
        extra = np.where(order >= TRIPLE_ORDER, 2.0, np.where(order >= DOUBLE_ORDER, 1.0, 0.0))
        weighted = extra if self.static.full else self._bw[ab] * extra  # 1.0 * extra is extra
        if not np.count_nonzero(planar_atom):
            return 2.0 * float(weighted.sum()), 0.0
        planar = float(self.occ[planar_atom].sum())
        usable = ~planar_atom[bi] & ~planar_atom[bj]
        short = 2.0 * float(weighted[usable].sum())
        return short, planar

    def _saturated(self, split: _Split) -> np.ndarray:
        """Cations with four or more short, near-equal bonds to anions (a
        tetrahedral framework atom): no room for a lone pair."""
        n = self.crystal.natoms
        short = split.ca & (self.contacts.ratio[self.bonded] <= SATURATED_RATIO)
        i, j = self.bi[short], self.bj[short]
        out = ~split.role & (np.bincount(i, minlength=n) + np.bincount(j, minlength=n) >= 4)
        if np.count_nonzero(out):
            ends = np.concatenate([i, j])
            dd = np.concatenate([self.bd[short], self.bd[short]])
            lo = filled(n, np.inf)
            hi = np.zeros(n)
            np.minimum.at(lo, ends, dd)
            np.maximum.at(hi, ends, dd)
            out &= hi <= lo * 1.05
        return out

    def _close(self, split: _Split, keep_needed: float, n_anion: float) -> Closure:
        """Find kept electrons per cation group (lone pairs, d electrons,
        cation-cation bonds) and pi electrons that make the count close."""
        tol = max(TOL * n_anion, 0.02)
        options = self._group_options(split)
        totals, top = _reachable(options, keep_needed - tol, keep_needed + tol)
        pi_short = pi_planar = 0.0
        best = _match(totals, keep_needed, tol)
        pi = 0.0
        if best is None and keep_needed < tol + top:
            pi_short, pi_planar = self._pi_capacity(split)
            cap = pi_short + pi_planar
            steps = int(math.floor(cap + 1e-6))
            totals, _ = _reachable(options, keep_needed + min(1.0, cap) - tol, keep_needed + cap + tol)
            for p in range(1, steps + 1):
                best = _match(totals, keep_needed + p, tol)
                if best is not None:
                    pi = float(p)
                    break
            if best is None and cap - steps > 1e-6:
                best = _match(totals, keep_needed + cap, tol)
                pi = cap if best is not None else 0.0
        if best is None:
            return Closure(False)
        cost, choice, mixed = best
        keep = {g: v for g, v in choice.items()}
        if split.four:
            # Ce, Pr, Tb counted with four electrons: kept electrons against
            # their valence of three (-1 for 4+).
            four_z = self.static.four_z
            for g, (zz, _sym, _block) in enumerate(self.static.group_elements):
                if zz in four_z and g in keep:
                    keep[g] -= 1.0
        from_planar = min(pi, pi_planar)
        return Closure(True, keep, pi, pi - from_planar, from_planar, mixed, cost)

    def _group_options(self, split: _Split) -> tuple:
        """Per cation group: (group index, weight, ((kept electrons per atom, cost), ...))."""
        out = []
        go, per, cc_any = self.static.group_of, split.per, split.cc_any
        ng = len(self.static.groups)
        ccb_all = None
        if cc_any:
            # np.mean of each group's bonds per atom; with whole atoms the bond
            # counts are whole and no group needs np.mean itself.
            size = self.static.group_size
            crowded = [] if self.static.full else np.flatnonzero(size >= 8).tolist()
            ccb_all = group_mean(per, go, size, crowded).tolist()
        all_saturated = None
        anion_z, weight, override = split.anion_z, self.static.group_weight, self.valence_override
        # Ce, Pr, Tb reach 4+ beside the hardest anions only (oxides,
        # fluorides: CeO2, Na2PrO3, TbF4). Where every anion is O or F
        # (split.four), evaluate counts four electrons for them and they may
        # keep one (3+) or none (4+), both common; _close reports the kept
        # electrons against their usual three (-1 for 4+). Elsewhere they
        # count three, as 3+.
        four_z = self.static.four_z if split.four else ()
        for g, (zz, sym, block) in enumerate(self.static.group_elements):
            if zz in anion_z:
                continue
            # cation-cation bonds per atom (none without a cation-cation bond)
            ccb = ccb_all[g] if cc_any else 0.0
            overridden = sym in override
            saturated = False
            if overridden or block == "p":
                if all_saturated is None:
                    all_saturated = (np.bincount(go[~self._saturated(split)], minlength=ng) == 0).tolist()
                saturated = all_saturated[g]
            if zz in four_z:
                out.append((g, weight[g], _THREE_OR_FOUR))
            else:
                out.append((g, weight[g], _kept_options(zz, ccb, overridden, saturated)))
        return tuple(out)


_FOUR_PLUS_ANION_Z = frozenset(elements.numbers()[s] for s in elements.FOUR_PLUS_ANIONS)
_TETRAVALENT_Z = frozenset(elements.numbers()[s] for s in elements.TETRAVALENT_LANTHANIDES)
_THREE_OR_FOUR = ((0.0, 0), (1.0, 0))  # electrons kept of four, cost


@lru_cache(maxsize=4096)
def _kept_options(z: int, ccb: float, overridden: bool, saturated: bool) -> tuple:
    """((kept electrons per atom, cost), ...) for a cation group of element z
    with ccb cation-cation bonds per atom. A p-block cation keeps its
    cation-cation bonds and may keep a lone pair (not when all its atoms are
    saturated); one whose valence the user set keeps its cation-cation bonds
    alone; other cations keep at least the electrons of their cation-cation
    bonds."""
    _sym, block, _valence, keep = elements.facts(z)
    opts = {0: 0} if overridden else keep
    if block == "p" or overridden:
        if saturated:
            opts = {0: 0}
        return tuple((ccb + k, c) for k, c in opts.items())
    # (as floats, like the p-block options above: option sets that compare
    # equal then also hand back the same types, whichever was met first in
    # the caches keyed by them)
    return tuple((float(k), c) for k, c in opts.items() if k >= ccb - 1e-6)


def _local_totals(w: float, options: tuple) -> dict:
    """Kept electrons of one group of weight w with options ((kept electrons
    per atom, cost), ...): total -> (cost, electrons per atom, mixed)."""
    local: dict[float, tuple[float, float, bool]] = {}
    items = sorted(options)
    for k, c in items:
        # A small convex term spreads kept electrons evenly over the sites
        # of one element (V3+ on two sites rather than V2+ and V4+).
        local.setdefault(round(w * k, 4), (c * w + 0.001 * w * k * k, k, False))
    wi = int(round(w))
    if abs(w - wi) < 1e-6 and 1 < wi <= 96 and len(items) > 1:
        for x in range(len(items)):
            for y in range(x + 1, len(items)):
                (k1, c1), (k2, c2) = items[x], items[y]
                for a in range(1, wi):
                    tot = round(a * k1 + (wi - a) * k2, 4)
                    cost = a * c1 + (wi - a) * c2 + 0.5 + 0.001 * (a * k1 * k1 + (wi - a) * k2 * k2)
                    if tot not in local or local[tot][0] > cost:
                        local[tot] = (cost, tot / wi, True)
    return local


# Totals of kept electrons are rounded to 4 decimals. The searches hold them
# as whole numbers of 1e-4 electrons: these add exactly, and u / UNITS is the
# float that rounding the sum of the two floats to 4 decimals would give
# (each float is within far less than 0.5e-4 of its 4-decimal value).
UNITS = 10000


@lru_cache(maxsize=4096)
def _local(w: float, options: tuple) -> tuple:
    """One group's totals as the searches use them, cached: (choices,
    smallest, largest, whole). choices: ((total in units of 1/UNITS, (cost,
    electrons per atom, mixed)), ...) from `_local_totals`; smallest and
    largest total in electrons; whole: every total a whole number. Kept
    electrons are floats in every option set (`_kept_options`), so option
    sets that compare equal hand back the same types."""
    totals = _local_totals(w, options)
    choices = tuple((round(t * UNITS), v) for t, v in totals.items())
    return choices, min(totals), max(totals), all(t == int(t) for t in totals)


MAX_STATES = 20000


REACHED_SIZE = 32
REACHED_STATES = 2000


def _reachable(options, lo: float = -math.inf, hi: float = math.inf):
    """`_search`, remembered (per thread): the checks of one structure (the
    criterion range, element swaps) ask the same question several times."""
    cache = getattr(_LOCAL, "reached", None)
    if cache is None:
        cache = _LOCAL.reached = OrderedDict()
    key = (options, lo, hi)
    hit = cache.get(key)
    if hit is not None:
        cache.move_to_end(key)
        return hit
    out = _search(options, lo, hi)
    if len(out[0]) <= REACHED_STATES:  # bounded memory: large searches are not kept
        cache[key] = out
        if len(cache) > REACHED_SIZE:
            cache.popitem(last=False)
    return out


def _search(options, lo: float = -math.inf, hi: float = math.inf):
    """Totals of kept electrons reachable by choosing one option per group
    (uniform over the group) or mixing two options within a group; options
    as from `_Context._group_options`.

    Returns (totals, top): totals maps total -> (cost, path), path a linked
    list (group, (cost, electrons per atom, mixed) of its choice, previous
    path) that `_match` unrolls; top is the largest reachable total. Only
    totals that can still end within [lo, hi] are followed: a state is
    dropped when even its smallest and largest completions miss the window.
    Dropping never changes which path wins a kept total (every path to a
    kept total runs through kept states, met in the same order), so the
    result within the window is that of the full enumeration. The
    enumeration stops after a group that leaves more than MAX_STATES
    totals; the window is used only where that cannot happen."""
    locs = []
    for g, w, opts in options:
        if not opts:
            # A group without options leaves no totals, unless the enumeration
            # stops (MAX_STATES) before it.
            if _few_totals(locs):
                return {}, 0.0
            return _enumerate(options)
        locs.append((g, _local(w, opts)))
    windowed = (lo > -math.inf or hi < math.inf) and _few_totals(locs)
    if not windowed:
        return _enumerate(options)
    # Smallest and largest completion after each group; a rounding slack of
    # 1e-4 per remaining group keeps the bounds conservative.
    n = len(locs)
    rest_lo = [0.0] * (n + 1)
    rest_hi = [0.0] * (n + 1)
    for L in range(n - 1, -1, -1):
        _choices, smallest, largest, _whole = locs[L][1]
        rest_lo[L] = rest_lo[L + 1] + smallest
        rest_hi[L] = rest_hi[L + 1] + largest
    top = 0.0
    for _g, (_choices, _smallest, largest, _whole) in locs:
        top = round(top + largest, 4)
    states: dict[int, tuple[float, tuple | None]] = {0: (0.0, None)}
    for L, (g, (choices, _smallest, _largest, _whole)) in enumerate(locs):
        slack = (n - L) * 1e-4 + 1e-6
        a, b = lo - slack - rest_hi[L], hi + slack - rest_lo[L]
        states = _combine(states, choices, g, a, b)
        if not states:
            break
    return {u / UNITS: v for u, v in states.items()}, top


def _combine(states, items, g, a=-math.inf, b=math.inf):
    """Add one group's choices to every total in [a, b], keeping the cheapest
    way to each new total and a back-pointer to how it was reached. Totals
    are in units of 1/UNITS (the bounds a, b in electrons)."""
    new: dict[int, tuple[float, tuple | None]] = {}
    get = new.get
    for u0, (c0, p0) in states.items():
        t0 = u0 / UNITS
        if t0 < a or t0 > b:
            continue
        for u1, choice in items:
            u = u0 + u1
            cost = c0 + choice[0]
            old = get(u)
            if old is None or old[0] > cost:
                new[u] = (cost, (g, choice, p0))
    return new


def _few_totals(locs) -> bool:
    """True when no group can leave more than MAX_STATES distinct totals
    (locs: (group, `_local` record) per group)."""
    bound = 1
    for _g, (choices, _smallest, _largest, _whole) in locs:
        bound *= len(choices)
        if bound > MAX_STATES:
            break
    if bound <= MAX_STATES:
        return True
    if all(whole for _g, (_c, _s, _l, whole) in locs):
        # Whole totals: at most (largest - smallest + 1) of them.
        span = sum(largest - smallest for _g, (_c, smallest, largest, _w) in locs)
        return span + 1 <= MAX_STATES
    return False


def _enumerate(options):
    """Every reachable total (the window-free case of `_reachable`)."""
    states: dict[int, tuple[float, tuple | None]] = {0: (0.0, None)}
    for g, w, opts in options:
        if not opts:
            return {}, 0.0
        states = _combine(states, _local(w, opts)[0], g)
        if len(states) > MAX_STATES:
            break
    return {u / UNITS: v for u, v in states.items()}, max(states, default=0) / UNITS


def _match(totals, needed: float, tol: float):
    best = None
    for t, (cost, path) in totals.items():
        if abs(t - needed) <= tol and (best is None or cost < best[0]):
            best = (cost, path)
    if best is None:
        return None
    cost, path = best
    steps = []
    while path is not None:
        g, (_cost, k, mixed), path = path
        steps.append((g, k, mixed))
    steps.reverse()
    return cost, {g: k for g, k, _m in steps}, [g for g, _k, m in steps if m]
