"""Diagnose stage: turn a count into a verdict and findings with evidence."""
from __future__ import annotations

import numpy as np

from . import elements
from . import findings as F
from .bonds import Contacts
from .count import Count, target
from .record import Crystal
from .symmetry import Sites

CONSISTENT = "consistent"
MISMATCH = "mismatch"
NOT_APPLICABLE = "not-applicable"


def _fmt(x: float) -> str:
    return f"{x:.3g}" if abs(x - round(x)) > 1e-6 else str(int(round(x)))


def diagnose(crystal: Crystal, contacts: Contacts, sites: Sites, c: Count | None, fragile_sites: list[str]):
    """Return (verdict, findings)."""
    out: list[F.Finding] = []
    syms = elements.symbols()
    present = sorted({syms[z] for z in crystal.numbers})
    if c is None:
        out.append(F.NothingToCount(why=f"no element of {', '.join(present)} can take the anion role: a metal or intermetallic"))
        out.append(F.Metallic(why="only metals are present"))
        return NOT_APPLICABLE, out
    if len(present) == 1:
        el = present[0]
        if not elements.can_be_anion(el) or (c.vec_anion < 4 and el not in ("H", "He")):
            what = "a metal" if not elements.can_be_anion(el) else f"an element with {_fmt(c.vec_anion)} valence electrons"
            out.append(F.NothingToCount(why=f"{el} is {what}: no octets to complete by two-centre bonds"))
            out.append(F.Metallic(why=f"elemental {el}: {_fmt(c.vec_anion)} valence electrons per atom, fewer than four"))
            return NOT_APPLICABLE, out

    partial = crystal.occupancy < 0.999
    if partial.any():
        n_sites = len({int(s) for s in sites.site[partial]})
        out.append(F.OccupancyAverage(n=n_sites))
    if fragile_sites:
        out.append(
            F.AmbiguousCutoff(sites=fragile_sites, n=len(fragile_sites), pct=3, evidence={"sites": fragile_sites})
        )

    cl = c.closure
    if cl.closes:
        out.extend(_explanations(crystal, contacts, c))
        if not c.valid:
            out.append(F.InvalidSplit(note=c.note))
        return CONSISTENT, out

    # Open count.
    metallic = _metallic_reason(crystal, c)
    if metallic:
        out.append(F.Metallic(why=metallic, evidence={"vec_anion": round(c.vec_anion, 3)}))
    if c.residual > 0:
        out.append(F.ElectronExcess(e=_fmt(round(c.residual, 3)), evidence={"residual": round(c.residual, 3)}))
    else:
        out.append(F.ElectronDeficit(e=_fmt(round(-c.residual, 3)), evidence={"residual": round(c.residual, 3)}))
    return MISMATCH, out


def _metallic_reason(crystal: Crystal, c: Count) -> str:
    if c.vec_anion < 4:
        return f"VEC per anion is {c.vec_anion:.2f}, below 4: too few electrons for octets"
    z = crystal.numbers
    an = c.role
    if an.any():
        coord = c.aa_bonds[an]
        if coord.size and float(np.mean(coord)) >= 6:
            return f"anions have {float(np.mean(coord)):.1f} anion neighbours on average: a close-packed metallic arrangement"
    if all(elements.table()[elements.symbols()[k]]["group"] <= 14 for k in np.unique(z[an])):
        if c.residual > 0:
            return "the anions are group 13-14 elements with electrons left over: likely a polar intermetallic"
    return ""


def _explanations(crystal: Crystal, contacts: Contacts, c: Count) -> list[F.Finding]:
    out: list[F.Finding] = []
    syms = elements.symbols()
    cl = c.closure
    lone, dstates, lanth = [], [], []
    weight = {}
    for g, k in cl.keep.items():
        site, z = c.groups[g]
        sym = syms[z]
        atoms = c.group_of == g
        w = float(np.sum(crystal.occupancy[atoms]))
        weight[g] = w
        ccb = float(np.mean(c.aa_bonds[atoms]))
        nonbond = k - ccb
        blk = elements.block(sym)
        v = elements.valence(sym)
        label = _label(crystal, atoms)
        if blk == "p" and nonbond > 1e-6:
            lone.append((label, sym, w * nonbond))
        elif blk == "d" or sym in elements.DLIKE_ACTINIDES:
            if k > 1e-6:
                dstates.append((label, sym, v - k, k))
        elif sym in elements.DIVALENT_LANTHANIDES and k > 1e-6:
            lanth.append(label)
    if lone:
        n = sum(x[2] for x in lone)
        who = ", ".join(f"{lab} ({s})" for lab, s, _ in lone)
        out.append(F.LonePairs(sites=[x[0] for x in lone], n=_fmt(n), who=who, evidence={"electrons_per_cell": round(n, 3)}))
    if dstates:
        states = ", ".join(f"{lab} {s}{_sign(ox)} d{_fmt(k)}" for lab, s, ox, k in dstates)
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
    if np.any(c.cc_bond):
        bi = contacts.i[contacts.bonded][c.cc_bond]
        bj = contacts.j[contacts.bonded][c.cc_bond]
        dd = contacts.d[contacts.bonded][c.cc_bond]
        w = contacts.weight[contacts.bonded][c.cc_bond]
        pairs = sorted({f"{syms[crystal.numbers[a]]}-{syms[crystal.numbers[b]]} {d:.2f} A" for a, b, d in zip(bi, bj, dd)})
        out.append(
            F.CationCationBonds(
                n=_fmt(float(np.sum(w))),
                pairs=", ".join(pairs[:4]),
                e=_fmt(round(c.cc_observed, 3)),
                evidence={"bonds_per_cell": round(float(np.sum(w)), 3), "contacts": pairs},
            )
        )
    if cl.pi_from_short > 0:
        bi = contacts.i[contacts.bonded][c.aa_bond]
        bj = contacts.j[contacts.bonded][c.aa_bond]
        dd = contacts.d[contacts.bonded][c.aa_bond]
        rat = contacts.ratio[contacts.bonded][c.aa_bond]
        order = np.argsort(rat)[:4]
        pairs = sorted({f"{syms[crystal.numbers[bi[k]]]}-{syms[crystal.numbers[bj[k]]]} {dd[k]:.2f} A" for k in order})
        out.append(
            F.MultipleBonds(e=_fmt(cl.pi_from_short), pairs=", ".join(pairs), evidence={"pi_electrons_per_cell": cl.pi_from_short, "shortest": pairs})
        )
    if cl.pi_from_planar > 0:
        out.append(F.PiBonds(n=_fmt(cl.pi_from_planar), evidence={"planar_sites_per_cell": cl.pi_from_planar}))
    if cl.mixed_groups:
        for g in cl.mixed_groups:
            atoms = c.group_of == g
            sym = syms[c.groups[g][1]]
            out.append(F.MixedValence(sites=[_label(crystal, atoms)], who=_label(crystal, atoms), avg=f"{elements.valence(sym) - cl.keep[g]:+.2f}"))
    return out


def _sign(ox: float) -> str:
    ox = round(ox, 2)
    if abs(ox - round(ox)) < 1e-6:
        ox = int(round(ox))
        return f"{abs(ox)}{'+' if ox >= 0 else '-'}" if ox else "0"
    return f"{ox:+.2f}"


def _label(crystal: Crystal, atoms: np.ndarray) -> str:
    k = int(np.flatnonzero(atoms)[0])
    lab = str(crystal.labels[k]) if len(crystal.labels) else ""
    return lab or f"{elements.symbols()[int(crystal.numbers[k])]}{k + 1}"
