"""Diagnose stage: turn a count into a verdict and ranked findings with evidence.

Each probe is a small function over plain data (the crystal record, its
contacts, sites and count) that returns findings; `diagnose` runs them and
ranks the causes.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from . import elements
from . import findings as F
from .arrays import first_index
from .bonds import WOBBLE, Contacts, Criterion, find_contacts, rescaled
from .count import PAULING_K, Count, count, same_count, target
from .motifs import Component, anion_components, find_clusters, wade
from .motifs import formula as formula_of_numbers
from .record import Crystal
from .symmetry import Sites

CONSISTENT = "consistent"
MISMATCH = "mismatch"
NOT_APPLICABLE = "not-applicable"

# Element swaps tried per structure (each is a new count), and the largest
# number of (site, element) groups for which the probe runs at all.
MAX_SWAPS = 6
MAX_SWAP_GROUPS = 24
# Lone pair counted as stereochemically active above this offset (angstrom):
# common practice, no source.
ACTIVE_OFFSET = 0.25


@dataclass(slots=True)
class Case:
    crystal: Crystal
    contacts: Contacts
    sites: Sites
    count: Count | None
    anions: list[str] | None = None
    valence: dict = field(default_factory=dict)
    criterion: Criterion = field(default_factory=Criterion)
    fragile_sites: list[str] = field(default_factory=list)
    components: list[Component] = field(default_factory=list)


def _fmt(x: float) -> str:
    return f"{x:.3g}" if abs(x - round(x)) > 1e-6 else str(int(round(x)))


def _mean(x: np.ndarray) -> float:
    """np.mean of a non-empty array (the same float64 sum divided by the
    count), without np.mean's Python-level steps, which cost more than the
    sum on these short arrays."""
    return float(np.add.reduce(x, dtype=np.float64)) / x.size


def _first_atoms(c: Count) -> list[int]:
    """Index of the first atom of every group of a count (the atom whose
    label names the group)."""
    return first_index(c.group_of.tolist())


def diagnose(crystal, contacts, sites, c, fragile_sites, anions=None, valence=None, criterion=None):
    """Return (verdict, findings ranked most likely first, anion components)."""
    verdict, found, components = _diagnose(crystal, contacts, sites, c, fragile_sites, anions, valence, criterion)
    return verdict, found + _repairs(crystal), components


# What the reader records in Crystal.meta when it mends a file.
REPAIRS = {
    "quote_repairs": "{} unclosed quote(s) closed",
    "preamble_lines": "{} line(s) before the first data block skipped",
    "renamed_blocks": "repeated data-block names renamed ({})",
    "repeated_tags": "repeated tags, first value kept ({})",
    "merged_duplicates": "{} atom(s) listed twice merged",
    "symmetry_completed": "the list of symmetry operators completed",
}


def _repairs(crystal: Crystal) -> list[F.Finding]:
    meta = crystal.meta or {}
    if not meta.keys() & REPAIRS.keys():  # the usual case: nothing mended
        return []
    what = []
    for key, text in REPAIRS.items():
        v = meta.get(key)
        if v:
            what.append(text.format(", ".join(map(str, v)) if isinstance(v, (list, tuple)) else v))
    if not what:
        return []
    return [F.FileRepaired(what="; ".join(what), evidence={k: meta[k] for k in REPAIRS if meta.get(k)})]


def _diagnose(crystal, contacts, sites, c, fragile_sites, anions=None, valence=None, criterion=None):
    case = Case(crystal, contacts, sites, c, anions, dict(valence or {}), criterion or Criterion(), list(fragile_sites))
    out: list[F.Finding] = []
    syms = elements.symbols()
    zs = set(crystal.numbers.tolist())
    if c is None:
        present = sorted(syms[z] for z in zs)
        out.append(F.NothingToCount(why=f"no element of {', '.join(present)} can take the anion role: a metal or intermetallic"))
        out.append(F.Metallic(why="only metals are present"))
        return NOT_APPLICABLE, out, []
    if len(zs) == 1:
        el = syms[zs.pop()]
        if not elements.can_be_anion(el) or (c.vec_anion < 4 and el not in ("H", "He")):
            what = "a metal" if not elements.can_be_anion(el) else f"an element with {_fmt(c.vec_anion)} valence electrons"
            out.append(F.NothingToCount(why=f"{el} is {what}: no octets to complete by two-centre bonds"))
            out.append(F.Metallic(why=f"elemental {el}: {_fmt(c.vec_anion)} valence electrons per atom"))
            return NOT_APPLICABLE, out, anion_components(crystal, contacts, c)

    case.components = anion_components(crystal, contacts, c)
    partial = crystal.occupancy < 0.999
    if np.count_nonzero(partial):
        out.append(_occupancy(case, partial))

    if c.closure.closes:
        out.extend(_explanations(case))
        if not c.valid:
            out.append(F.InvalidSplit(note=c.note))
        out.extend(_cutoff_range(case, CONSISTENT))
        return CONSISTENT, out, case.components

    clusters = _clusters(case)
    if clusters and clusters[0].rank >= 1.0:
        out.extend(clusters)
        out.extend(_cutoff_range(case, CONSISTENT))
        return CONSISTENT, out, case.components

    # The criterion range before the probes: the element swaps count other
    # structures, and count() remembers only the last structure's static
    # quantities.
    cutoff = _cutoff_range(case, MISMATCH)
    found: list[F.Finding] = []
    found += clusters
    metallic = _metallic(case)
    found += metallic
    found += _hypervalent(case)
    if not metallic:
        # Oxidation states, swapped elements and missing atoms mean little
        # in a metal or an intermetallic, where the count is not expected to close.
        found += _polar_intermetallic(case)
        found += _oxidation_states(case)
        found += _swaps(case)
        found += _missing(case)
    if c.residual > 0:
        found.append(F.ElectronExcess(rank=0.2, e=_fmt(round(c.residual, 3)), evidence={"residual": round(c.residual, 3)}))
    else:
        found.append(F.ElectronDeficit(rank=0.2, e=_fmt(round(-c.residual, 3)), evidence={"residual": round(c.residual, 3)}))
    found.sort(key=lambda f: -f.rank)
    return MISMATCH, found + out + cutoff, case.components


def _occupancy(case: Case, partial: np.ndarray) -> F.Finding:
    """Occupancy-weighted count: the smallest supercell an ordered model needs,
    and whether ordering could close an open count."""
    cr, c = case.crystal, case.count
    n_sites = len({int(s) for s in case.sites.site[partial]})
    per_site_el = {}
    for k in range(cr.natoms):
        key = (int(case.sites.site[k]), int(cr.numbers[k]))
        per_site_el[key] = per_site_el.get(key, 0.0) + float(cr.occupancy[k])
    n_super = None
    for n in range(1, 25):
        if all(abs(v * n - round(v * n)) < 0.02 for v in per_site_el.values()):
            n_super = n
            break
    imbalance = c.residual * c.n_anion
    b = case.contacts.bonded
    bi, bj = case.contacts.i[b][c.aa_bond], case.contacts.j[b][c.aa_bond]
    partial_aa = bool(np.any(partial[bi] | partial[bj]))
    if c.closure.closes:
        ordered = "the averaged count closes"
    elif partial_aa:
        ordered = ("ordering keeps the electron total; it could close the count only by changing the bonds "
                   "between partly occupied anion sites")
    else:
        ordered = f"no ordered arrangement can close it: the electron total is off by {imbalance:+.2f} per cell"
    if n_super:
        ordered += f" (an ordered model needs at least a {n_super}-fold supercell)"
    return F.OccupancyAverage(n=n_sites, ordered=ordered,
                              evidence={"electrons_per_cell": round(c.electrons, 3), "supercell_for_ordering": n_super,
                                        "electron_imbalance_per_cell": round(imbalance, 3)})


# ---------------------------------------------------------------------------
# Explaining a closed count


def _explanations(case: Case) -> list[F.Finding]:
    crystal, c = case.crystal, case.count
    out: list[F.Finding] = []
    syms = elements.symbols()
    cl = c.closure
    first = None  # _first_atoms(c), when a finding names a group
    lone, dstates, lanth, tetra = [], [], [], []
    groups, valence = c.groups, case.valence
    for g, k in cl.keep.items():
        z = groups[g][1]
        sym, blk, v, _keep = elements.facts(z)  # (cached per element)
        if blk == "p":
            atoms = c.group_of == g
            nonbond = k - _mean(c.aa_bonds[atoms])  # electrons kept beyond cation-cation bonds
            if nonbond > 1e-6:
                if first is None:
                    first = _first_atoms(c)
                w = float(crystal.occupancy[atoms].sum())
                lone.append((crystal.label(first[g]), sym, w * nonbond, first[g]))
        elif k > 1e-6:
            if blk == "d" or sym in elements.DLIKE_ACTINIDES:
                if first is None:
                    first = _first_atoms(c)
                v = valence.get(sym, v)
                dstates.append((crystal.label(first[g]), sym, v - k, k))
            elif sym in elements.DIVALENT_LANTHANIDES:
                if first is None:
                    first = _first_atoms(c)
                lanth.append(crystal.label(first[g]))
        elif k < -1e-6 and sym in elements.TETRAVALENT_LANTHANIDES:  # kept -1 of three: 4+
            if first is None:
                first = _first_atoms(c)
            tetra.append(crystal.label(first[g]))
    if lone:
        n = sum(x[2] for x in lone)
        who = ", ".join(f"{lab} ({s})" for lab, s, _, _ in lone)
        out.append(F.LonePairs(sites=[x[0] for x in lone], n=_fmt(n), who=who, evidence={"electrons_per_cell": round(n, 3)}))
        for lab, s, _, atom in lone:
            off = _centroid_offset(case, atom)
            if off is None:
                continue
            state = "stereochemically active" if off > ACTIVE_OFFSET else "inert (centred)"
            out.append(F.LonePairActivity(sites=[lab], who=f"{lab} ({s})", state=state, offset=f"{off:.2f}",
                                          evidence={"offset_A": round(off, 3), "active": bool(off > ACTIVE_OFFSET)}))
    if dstates:
        states = ", ".join(f"{s}{_sign(ox)} d{_fmt(k)} at {lab}" for lab, s, ox, k in dstates)
        who = ", ".join(sorted({s for _, s, _, _ in dstates}))
        out.append(
            F.DElectrons(
                sites=[x[0] for x in dstates],
                who=who,
                states=states,
                evidence={lab: {"oxidation_state": round(ox, 3), "d_electrons": round(k, 3)} for lab, s, ox, k in dstates},
            )
        )
    if lanth:
        out.append(F.DivalentLanthanide(sites=lanth, who=", ".join(lanth)))
    if tetra:
        out.append(F.TetravalentLanthanide(sites=tetra, who=", ".join(tetra)))
    if np.count_nonzero(c.cc_bond):
        pairs, w = _pairs(case, c.cc_bond)
        out.append(
            F.CationCationBonds(
                n=_fmt(w), pairs=", ".join(pairs[:4]), e=_fmt(round(c.cc_observed, 3)),
                evidence={"bonds_per_cell": round(w, 3), "contacts": pairs},
            )
        )
    if cl.pi_from_short > 0:
        pairs, _ = _pairs(case, c.aa_bond, shortest=4)
        out.append(F.MultipleBonds(e=_fmt(cl.pi_from_short), pairs=", ".join(pairs),
                                   evidence={"pi_electrons_per_cell": cl.pi_from_short, "shortest": pairs}))
    if cl.pi_from_planar > 0:
        out.append(F.PiBonds(n=_fmt(cl.pi_from_planar), evidence={"planar_sites_per_cell": cl.pi_from_planar}))
    if cl.mixed_groups and first is None:
        first = _first_atoms(c)
    for g in cl.mixed_groups:
        lab = crystal.label(first[g])
        sym = syms[c.groups[g][1]]
        out.append(F.MixedValence(sites=[lab], who=lab, avg=f"{elements.valence(sym) - cl.keep[g]:+.2f}"))
    return out


def _pairs(case: Case, mask, shortest: int | None = None):
    crystal, contacts = case.crystal, case.contacts
    syms = elements.symbols()
    sel = contacts.bonded.nonzero()[0][mask]  # mask is over the bonded contacts
    order = np.argsort(contacts.ratio[sel])
    if shortest:
        order = order[:shortest]
    pick = sel[order]
    z = crystal.numbers
    pairs = sorted({f"{syms[a]}-{syms[b]} {d:.2f} A"
                    for a, b, d in zip(z[contacts.i[pick]].tolist(), z[contacts.j[pick]].tolist(), contacts.d[pick].tolist())})
    return pairs, float(contacts.weight[sel].sum())


def _sign(ox: float) -> str:
    ox = round(ox, 2)
    if abs(ox - round(ox)) < 1e-6:
        ox = int(round(ox))
        return f"{abs(ox)}{'+' if ox >= 0 else '-'}" if ox else "0"
    return f"{ox:+.2f}"


def _outward(case: Case, atom: int, sel: np.ndarray) -> np.ndarray:
    """Vectors from atom to its partners in the contacts sel (indices of
    contacts that all involve atom)."""
    c = case.contacts
    v = c.vectors(case.crystal, sel)
    v[c.i[sel] != atom] *= -1
    return v


def _centroid_offset(case: Case, atom: int) -> float | None:
    """Distance from atom to the centroid of its bonded neighbours of the
    other role (None with fewer than two)."""
    role = case.count.role
    c = case.contacts
    to_anion = role[c.i] != role[c.j]
    sel = np.flatnonzero(c.bonded & to_anion & ((c.i == atom) | (c.j == atom)))
    if sel.size < 2:
        return None
    return float(np.linalg.norm(_outward(case, atom, sel).mean(axis=0)))


# ---------------------------------------------------------------------------
# Probes for an open count


def _electrons_given(case: Case) -> float:
    """Electrons the cations hand over, taking electropositive cations fully."""
    c, cr = case.count, case.crystal
    syms = elements.symbols()
    tot = 0.0
    for k in np.flatnonzero(~c.role):
        sym = syms[cr.numbers[k]]
        tot += cr.occupancy[k] * case.valence.get(sym, elements.valence(sym))
    return tot


def _clusters(case: Case) -> list[F.Finding]:
    c, cr = case.count, case.crystal
    syms = elements.symbols()
    val = lambda k: case.valence.get(syms[cr.numbers[k]], elements.valence(syms[cr.numbers[k]]))
    found = find_clusters(cr, case.contacts, c, val)
    if not found:
        return []
    in_cluster = np.zeros(cr.natoms, dtype=bool)
    for cl in found:
        in_cluster[cl.atoms] = True
    others = c.role & ~in_cluster
    need = 0.0
    for k in np.flatnonzero(others):
        sym = syms[cr.numbers[k]]
        need += cr.occupancy[k] * (target(sym) - val(k) - c.aa_bonds[k])
    to_clusters = _electrons_given(case) - need
    found = wade(found, to_clusters)
    closes = all(cl.kind != "none" for cl in found)
    by_formula: dict[str, list] = {}
    for cl in found:
        by_formula.setdefault(formula_of_numbers(cr.numbers[cl.atoms]), []).append(cl)
    out = []
    for formula, group in by_formula.items():
        cl = group[0]
        pairs = cl.skeletal_electrons / 2
        verdict = f"a {cl.kind} count (closes)" if cl.kind != "none" else (
            f"no closo/nido/arachno count (closo needs {cl.expected['closo']})")
        f = F.DeficientCluster(
            sites=sorted({cr.label(a) for a in cl.atoms}),
            rank=1.0 if closes else 0.6,
            severity="info" if closes else "warning",
            n=len(group), formula=formula, pairs=_fmt(round(pairs, 2)), vertices=cl.vertices, verdict=verdict,
            evidence={"vertices": cl.vertices, "edges": cl.edges, "exo_bonds": cl.exo_bonds,
                      "skeletal_electrons": round(cl.skeletal_electrons, 3), "kind": cl.kind,
                      "electrons_from_cations_per_cell": round(to_clusters, 3), "expected_pairs": cl.expected},
        )
        out.append(f)
    out.sort(key=lambda f: -f.rank)
    return out


def _metallic(case: Case) -> list[F.Finding]:
    c, cr = case.count, case.crystal
    an = c.role
    ev = {"vec_anion": round(c.vec_anion, 3)}
    if c.vec_anion < 4:
        return [F.Metallic(rank=0.7, why=f"VEC per anion is {c.vec_anion:.2f}, below 4: too few electrons for octets", evidence=ev)]
    coord = c.aa_bonds[an]
    mean_coord = _mean(coord) if coord.size else 0.0
    if mean_coord >= 6:
        return [F.Metallic(rank=0.7, why=f"anions have {mean_coord:.1f} anion neighbours on average: a close-packed metallic arrangement", evidence=ev)]
    w_d = float(cr.occupancy[~an & elements.d_block_by_z()[cr.numbers]].sum())
    if c.residual > 0 and w_d > 0 and _top_anion_group(case) <= 14:
        return [F.Metallic(rank=0.7, why="group 13-14 anions with transition metals and electrons left over: an intermetallic", evidence=ev)]
    if c.n_anion and w_d / c.n_anion >= 2:
        return [F.Metallic(rank=0.7, why=f"metal-rich: {w_d / c.n_anion:.2g} transition-metal atoms per anion, bonded among themselves beyond what the count resolves", evidence=ev)]
    # Many near-equidistant anion neighbours without a gap, and electrons left over.
    if c.residual <= 0:
        return []
    rep = case.sites.representative
    gaps = sum(1 for s in set(case.sites.site[an].tolist()) if c.aa_bonds[rep[s]] >= 5)
    if gaps:
        return [F.Metallic(rank=0.45, why=f"{gaps} anion site(s) with five or more anion neighbours: delocalised bonding", evidence=ev)]
    return []


def _top_anion_group(case: Case) -> int:
    """The highest periodic-table group among the anion elements."""
    tab, syms = elements.table(), elements.symbols()
    return max(tab[syms[k]]["group"] for k in set(case.crystal.numbers[case.count.role].tolist()))


def _polar_intermetallic(case: Case) -> list[F.Finding]:
    """Group 13-14 anions with electrons left over but no transition metal: a
    Zintl phase gone metallic, or a mistyped site; the probes still run."""
    c = case.count
    if c.residual > 0 and _top_anion_group(case) <= 14:
        return [F.Metallic(rank=0.5, why="the anions are group 13-14 elements with electrons left over: possibly a polar intermetallic",
                           evidence={"vec_anion": round(c.vec_anion, 3)})]
    return []


def _hypervalent(case: Case) -> list[F.Finding]:
    c, cr = case.count, case.crystal
    if c.residual <= 0:
        return []
    syms = elements.symbols()
    rad = elements.radii()
    # Anion sites whose atom has more anion neighbours than its shell allows;
    # most structures have none, and the bond arrays are made only for these.
    over = []
    for s in sorted(set(case.sites.site[c.role].tolist())):
        k = int(case.sites.representative[s])
        if not c.role[k]:
            continue
        sym = syms[cr.numbers[k]]
        allowed = target(sym) - elements.valence(sym)
        n = c.aa_bonds[k]
        if n <= allowed + 1e-6 or allowed < 0:
            continue
        over.append((k, sym, allowed, n))
    if not over:
        return []
    out = []
    contacts = case.contacts
    aa = contacts.bonded.nonzero()[0][c.aa_bond]  # anion-anion bonds among the contacts
    aa_i, aa_j = contacts.i[aa], contacts.j[aa]
    for k, sym, allowed, n in over:
        sel = aa[(aa_i == k) | (aa_j == k)]
        if not 2 <= sel.size <= 4:  # the shapes below have two to four bonds
            continue
        v = _outward(case, k, sel)
        d = np.linalg.norm(v, axis=1)
        u = v / d[:, None]
        cosines = u @ u.T
        linear_pairs = int(np.sum(np.triu(cosines < -0.94, 1)))
        shape = None
        if v.shape[0] == 2 and linear_pairs == 1:
            shape = "linear"
        elif v.shape[0] == 3 and linear_pairs == 1:
            shape = "T-shaped"
        elif v.shape[0] == 4 and linear_pairs == 2:
            shape = "square-planar"
        if shape is None:
            continue
        # Pauling bond orders from lengths of the atom's anion-anion bonds.
        partners = cr.numbers[np.where(contacts.i[sel] == k, contacts.j[sel], contacts.i[sel])]
        d1 = rad[cr.numbers[k]] + rad[partners]
        orders = 10.0 ** ((d1 - d) / PAULING_K)
        if float(np.mean(orders)) > 0.85:
            continue
        vsum = float(np.sum(orders))
        lab = cr.label(k)
        out.append(F.Hypervalent(
            sites=[lab], rank=0.96, who=f"{lab} ({sym})", n=_fmt(n), allowed=allowed, shape=shape, vsum=f"{vsum:.2f}",
            evidence={"distances_A": [round(x, 3) for x in sorted(d)], "bond_orders": [round(x, 3) for x in sorted(orders, reverse=True)],
                      "valence_sum": round(vsum, 3), "shape": shape},
        ))
    return out


def _oxidation_states(case: Case) -> list[F.Finding]:
    """Implied oxidation state of the d-block cations if they took the whole residual."""
    c, cr = case.count, case.crystal
    syms = elements.symbols()
    tm = (~c.role & elements.d_block_by_z()[cr.numbers]).nonzero()[0].tolist()  # d-block cations
    if not tm:
        return []
    w = float(cr.occupancy[tm].sum())
    keep_needed = c.residual * c.n_anion + c.cc_observed * c.n_anion
    kept_each = keep_needed / w
    els = sorted({syms[cr.numbers[k]] for k in tm})
    if len(els) != 1:
        return []
    el = els[0]
    v = elements.valence(el)
    ox = v - kept_each
    if not np.isfinite(ox):  # a vanishing occupancy of the d-block sites
        return []
    common, known = elements.oxidation_states(el)
    if ox < -1e-6:
        why = "a negative state"
    elif ox > v + 1e-6:
        why = f"above its group number {v}"
    elif abs(ox - round(ox)) < 0.05 and round(ox) not in known:
        why = "not a known state"
    elif abs(ox - round(ox)) >= 0.05 and not (min(known, default=0) <= ox <= max(known, default=0)):
        why = "outside its known range"
    else:
        return []
    return [F.OddOxidationState(rank=0.55, sites=[cr.label(tm[0])], who=el, ox=f"{ox:+.2f}", why=why,
                                evidence={"implied_oxidation_state": round(ox, 3), "known_states": sorted(known)})]


def _recount(case: Case, crystal: Crystal, sites: Sites, contacts: Contacts | None = None) -> Count | None:
    """Count a variant of the structure. A neighbour in the periodic table has
    nearly the same radius, so an element swap reuses the contacts."""
    try:
        contacts = contacts if contacts is not None else find_contacts(crystal, case.criterion)
        return count(crystal, contacts, sites, case.anions, case.valence)
    except Exception:  # a swapped structure that cannot be counted is no candidate
        return None


def _swap_target(z: int, dz: int) -> int | None:
    """Atomic number z + dz when it is an element of z's row and neither is a
    noble gas, else None."""
    t = z + dz
    if not 1 <= t <= 103:
        return None
    tab, syms = elements.table(), elements.symbols()
    rz, rt = tab[syms[z]], tab[syms[t]]
    if rt["row"] != rz["row"] or rt["group"] == 18 or rz["group"] == 18:
        return None
    return t


def _swaps(case: Case) -> list[F.Finding]:
    """Change one crystallographic site's element by one in atomic number, or
    mix it, and see whether the count closes."""
    c, cr, sites = case.count, case.crystal, case.sites
    if cr.occupancy.min() < 0.999 or len(c.groups) > MAX_SWAP_GROUPS:
        return []
    syms = elements.symbols()
    hits, mixes = [], []
    # Electrons in excess call for a lighter neighbour, missing ones for a
    # heavier; try first the sites whose weight best matches the imbalance,
    # and at most MAX_SWAPS of them (each try is a new count).
    direction = -1 if c.residual > 0 else 1
    imbalance = abs(c.residual * c.n_anion)
    weight = np.bincount(c.group_of, weights=cr.occupancy, minlength=len(c.groups)).tolist()
    order = sorted(range(len(c.groups)), key=lambda g: abs(weight[g] - imbalance))
    tried = 0
    for g in order:
        if tried >= MAX_SWAPS:
            break
        z = c.groups[g][1]
        t = _swap_target(z, direction)
        if t is None:
            continue
        tried += 1
        nums = cr.numbers.copy()
        nums[c.group_of == g] = t
        alt = replace(cr, numbers=nums)
        cc = _recount(case, alt, sites, case.contacts)
        if cc is not None and cc.closure.closes and cc.closure.cost < 1:
            hits.append((cc.closure.cost, g, z, t))
        elif cc is not None:
            mixes.append((g, z, t))
    out = []
    first = _first_atoms(c)
    for cost, g, z, t in sorted(hits)[:3]:
        atoms = c.group_of == g
        lab = cr.label(first[g])
        out.append(F.Misassigned(
            sites=[lab], rank=0.95 - 0.05 * cost, site=lab, old=syms[z], new=syms[t], extra="",
            evidence={"site": lab, "from": syms[z], "to": syms[t], "atoms_per_cell": int(np.count_nonzero(atoms)),
                      "residual_as_refined": round(c.residual, 3)},
        ))
    if out:
        return out
    # Mixed occupancy: the fraction that would cancel the residual.
    for g, z, t in mixes:
        dv = elements.valence(syms[t]) - elements.valence(syms[z])
        if dv == 0:
            continue
        atoms = c.group_of == g
        if not c.role[atoms].all():
            continue
        w = float(cr.occupancy[atoms].sum())
        x = -c.residual * c.n_anion / (w * dv)
        if not 0.05 <= x <= 0.95:
            continue
        alt = _mixed(cr, atoms, t, x)
        alt_sites = _extend_sites(sites, atoms)
        cc = _recount(case, alt, alt_sites)
        if cc is not None and cc.closure.closes and cc.closure.cost < 1:
            lab = cr.label(first[g])
            out.append(F.Misassigned(
                sites=[lab], rank=0.75, site=lab, old=syms[z], new=f"{syms[z]}{1 - x:.2f}{syms[t]}{x:.2f}",
                extra=" (mixed occupancy)",
                evidence={"site": lab, "from": syms[z], "to": syms[t], "fraction": round(x, 3)},
            ))
    return out[:3]


def _mixed(cr: Crystal, atoms: np.ndarray, t: int, x: float) -> Crystal:
    occ = cr.occupancy.copy()
    occ[atoms] *= 1 - x
    idx = np.flatnonzero(atoms)
    return replace(
        cr,
        frac=np.vstack([cr.frac, cr.frac[idx]]),
        numbers=np.concatenate([cr.numbers, np.full(idx.size, t)]),
        occupancy=np.concatenate([occ, cr.occupancy[idx] * x]),
        labels=np.concatenate([cr.labels, cr.labels[idx]]) if len(cr.labels) else cr.labels,
        charges=np.concatenate([cr.charges, np.full(idx.size, np.nan)]),
    )


def _extend_sites(sites: Sites, atoms: np.ndarray) -> Sites:
    return replace(sites, site=np.concatenate([sites.site, sites.site[atoms]]))


def _missing(case: Case) -> list[F.Finding]:
    """Whole atoms per formula unit that would close the count."""
    from .api import formula_of

    c, cr = case.count, case.crystal
    syms = elements.symbols()
    _, z_cell = formula_of(cr)
    e_formula = c.residual * c.n_anion / z_cell  # electrons per formula unit
    if abs(e_formula) < 0.5:
        return []
    out = []
    present = sorted({syms[z] for z in cr.numbers.tolist()})
    anion_syms = [s for s in present if s in c.anions]
    if e_formula < 0:
        short = -e_formula
        on = sum(float(np.sum(cr.occupancy[cr.numbers == elements.numbers()[el]])) for el in ("O", "N") if el in anion_syms)
        if "H" not in present and on and short <= 2 * on / z_cell + 1e-6:
            n_h = short
            if abs(n_h - round(n_h)) < 0.05:
                per = f"{n_h / (c.n_anion / z_cell):.2g} per anion"
                return [F.MissingHydrogen(rank=0.97, n=_fmt(round(n_h)), per=per,
                                          evidence={"electrons_short_per_formula": round(short, 3)})]
    # Electrons missing: more cations or fewer anions; in excess: the reverse.
    # One atom carries its valence (a cation) or its shell's gap (an anion).
    cations = [s for s in present if s not in c.anions]
    more, fewer = (cations, anion_syms) if e_formula < 0 else (anion_syms, cations)
    for group, sign, rank in ((more, 1, 0.5), (fewer, -1, 0.45)):
        for s in group:
            unit = elements.valence(s) if s in cations else target(s) - elements.valence(s)
            k = abs(e_formula) / unit if unit else 0
            if unit and abs(k - round(k)) < 0.05 and 1 <= round(k) <= 4:
                what = f"{_fmt(round(k))} more {s}" if sign > 0 else f"{_fmt(round(k))} {s} fewer"
                out.append(F.MissingAtoms(rank=rank, what=what, evidence={
                    "electrons_per_formula": round(e_formula, 3), "element": s, "count": sign * round(k)}))
    return out[:3]


# ---------------------------------------------------------------------------
# Sensitivity to the bond criterion

SCALES = (0.94, 0.97, 1.03, 1.06)
# The scales below and above 1, each in order of distance from 1.
_DOWN = tuple(sorted((x for x in SCALES if x < 1), reverse=True))
_UP = tuple(sorted(x for x in SCALES if x > 1))


def _cutoff_range(case: Case, verdict: str) -> list[F.Finding]:
    """When contacts sit near the criterion, the range of criterion scales over
    which the verdict holds: walk outward from 1 on each side and stop at the
    first scale where it fails (only the continuous range is reported)."""
    if not case.fragile_sites:
        return []

    given, crit = case.contacts, case.criterion
    # The same bonds give the same count: the structure as given holds, and a
    # scale that bonds what the previous one did repeats its answer.
    answers = {given.bonded.tobytes(): True}
    # The contacts were judged with this criterion, and their fragile flags
    # mark the decisions that differ between the scales 1 - WOBBLE and
    # 1 + WOBBLE. With a relative tolerance of at least 1, a larger scale
    # raises every threshold of the criterion, so the bonds only grow with the
    # scale: at 1 - WOBBLE they are the bonds less the fragile contacts, at
    # 1 + WOBBLE the bonds and the fragile contacts, known without judging.
    known = {}
    if crit.relative >= 1 and crit.core > 0 and crit.maximum > 0:
        known = {1 - WOBBLE: given.bonded & ~given.fragile, 1 + WOBBLE: given.bonded | given.fragile}

    def holds(f: float) -> bool:
        bonded = known.get(f)
        if bonded is None:
            contacts = rescaled(case.crystal, given, crit.scaled(f))
            bonded = contacts.bonded
        else:
            contacts = None  # made below when the bonds need a count
        key = bonded.tobytes()
        if key not in answers and same_count(case.crystal, given, bonded, case.anions):
            # The bonds that differ change nothing count() decides (see
            # same_count): the count is the given one, whose verdict holds.
            answers[key] = True
        if key not in answers:
            if contacts is None:
                contacts = replace(given, bonded=bonded)
            try:
                cc = count(case.crystal, contacts, case.sites, case.anions, case.valence)
            except Exception:  # a variant that cannot be counted ends the range
                answers[key] = False
            else:
                v = NOT_APPLICABLE if cc is None else (CONSISTENT if cc.closure.closes else MISMATCH)
                answers[key] = v == verdict
        return answers[key]

    lo = hi = 1.0
    for f in _DOWN:
        if not holds(f):
            break
        lo = f
    for f in _UP:
        if not holds(f):
            break
        hi = f
    pct = f"{(lo - 1) * 100:+.0f}% to {(hi - 1) * 100:+.0f}%"
    return [F.AmbiguousCutoff(sites=case.fragile_sites, n=len(case.fragile_sites), pct=f"{WOBBLE * 100:g}",
                              rng=pct, evidence={"sites": case.fragile_sites, "verdict_holds_for_scale": [lo, hi]})]
