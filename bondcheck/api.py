"""Library entry points: one structure in, one Result out.

    >>> import bondcheck
    >>> r = bondcheck.check("sample.cif")
    >>> r.verdict, r.causes

The CLI calls `check_crystal`; scans and cluster runs call `check_crystals`,
which runs the same stages over a chunk of structures.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from functools import reduce
from operator import attrgetter
from pathlib import Path
from typing import Any, Iterable, Iterator

import numpy as np

from . import elements
from .arrays import first_seen_and_index, group_mean
from .bonds import Criterion, find_contacts, per_atom
from .count import Count, count, target
from .diagnose import diagnose
from .motifs import describe
from .record import Crystal, StructureError
from .symmetry import find_sites, group_sites


@dataclass(slots=True)
class Options:
    anions: list[str] | None = None
    valence: dict[str, int] = field(default_factory=dict)
    criterion: Criterion = field(default_factory=Criterion)
    # False: group atoms into sites by their environments instead of a
    # symmetry search (several times faster; no space group, Wyckoff letters
    # or multiplicities in the result).
    symmetry: bool = True

    def key(self) -> str:
        c = self.criterion
        an = ",".join(self.anions or [])
        va = ",".join(f"{k}={v}" for k, v in sorted(self.valence.items()))
        key = f"anions={an};valence={va};crit={c.core:.4f},{c.maximum:.4f},{c.relative:.4f}"
        return key if self.symmetry else key + ";symmetry=off"


@dataclass(slots=True)
class Result:
    path: str
    status: str = "ok"
    error: str | None = None
    name: str = ""
    formula: str = ""
    spacegroup: str = ""
    verdict: str | None = None
    causes: list[str] = field(default_factory=list)
    cations: list[str] = field(default_factory=list)
    anions: list[str] = field(default_factory=list)
    partition: str = ""
    vec_anion: float | None = None
    aa_predicted: float | None = None
    aa_observed: float | None = None
    cc_observed: float | None = None
    residual: float | None = None
    electrons_per_formula: float | None = None
    anions_per_formula: float | None = None
    sites: list[dict] = field(default_factory=list)
    polyanion: str = ""
    components: list[dict] = field(default_factory=list)
    findings: list = field(default_factory=list)
    seconds: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        # The fields in order with 'findings' last.
        d = dict(zip(_RESULT_KEYS, _result_values(self)))
        d["findings"] = [_finite(f.to_dict() if hasattr(f, "to_dict") else f) for f in self.findings]
        d["seconds"] = round(self.seconds, 5)
        return d


_RESULT_KEYS = tuple(k for k in Result.__slots__ if k != "findings")
_result_values = attrgetter(*_RESULT_KEYS)
# Values _finite returns as they are.
_AS_IS = frozenset((str, int, bool, type(None)))


def _finite(x):
    """Evidence with any non-finite float turned into null (JSON has no inf or
    nan); dicts, lists and tuples are copied, tuples as lists."""
    t = type(x)
    if t is float:
        return x if math.isfinite(x) else None
    if t is dict:
        return {k: v if type(v) in _AS_IS else _finite(v) for k, v in x.items()}
    if t is list or t is tuple:
        return [v if type(v) in _AS_IS else _finite(v) for v in x]
    # Subclasses (numpy floats, named tuples, ...) as their base types.
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return _finite(dict(x))
    if isinstance(x, (list, tuple)):
        return _finite(list(x))
    return x


def _r3(x: float | None) -> float | None:
    """x rounded to 3 decimals (0.0 for -0.0); None for None, inf or nan."""
    if x is None:
        return None
    x = float(x)
    if x.is_integer():  # the usual case: whole numbers round to themselves
        return x + 0.0
    return round(x, 3) + 0.0 if math.isfinite(x) else None


def formula_of(crystal: Crystal) -> tuple[str, float]:
    """Reduced formula (electropositive elements first) and formula units per cell."""
    syms = elements.symbols()
    en = elements.pauling_list()
    occ, numbers = crystal.occupancy, crystal.numbers
    if not np.count_nonzero(occ != 1.0):
        # Full occupancy: whole atom counts, divided by their common divisor.
        zs = numbers.tolist()
        counts = {z: zs.count(z) for z in set(zs)}
        g = math.gcd(*counts.values())
        order = sorted(counts, key=lambda z: (en[z], z))
        return "".join([syms[z] if counts[z] == g else f"{syms[z]}{counts[z] // g}" for z in order]), float(g)
    amounts = {int(z): float(np.sum(occ[numbers == z])) for z in np.unique(numbers)}
    ints = [round(a) for a in amounts.values()]
    if all(abs(a - round(a)) < 1e-3 for a in amounts.values()) and min(ints) > 0:
        g = reduce(math.gcd, ints)
    else:
        g = 1  # partial occupancy: amounts per cell as they are
    order = sorted(amounts, key=lambda z: (en[z], z))
    parts = []
    for z in order:
        n = amounts[z] / g
        if abs(n - 1) < 1e-3:
            parts.append(syms[z])
        elif abs(n - round(n)) < 1e-3:
            parts.append(f"{syms[z]}{int(round(n))}")
        else:
            parts.append(f"{syms[z]}{n:.3g}")
    return "".join(parts), float(g)


def check_crystal(crystal: Crystal, options: Options | None = None) -> Result:
    """Run bonds -> count -> diagnose on one crystal record."""
    t0 = time.perf_counter()
    options = options or Options()
    res = Result(path=crystal.source or crystal.name, name=crystal.name)
    try:
        contacts = _bonds_stage(crystal, options)
        sites = _sites_stage(crystal, contacts, options)
        _count_stage(crystal, contacts, sites, options, res)
    except StructureError as exc:
        res.status, res.error = "error", str(exc)
    res.seconds = time.perf_counter() - t0
    return res


def check_crystals(crystals: list[Crystal], options: Options | None = None) -> list[Result]:
    """`check_crystal` for each record, run stage by stage over the whole list:
    each stage's code and tables stay warm in the processor's caches, which
    makes small cells about a quarter faster (a scan's workers check their
    chunks this way).  The results are those of `check_crystal`, except that
    an unexpected exception in one structure becomes that structure's error
    result ('unexpected TypeName: message') instead of stopping the rest.
    ``seconds`` of each result is the time its own stages took."""
    options = options or Options()
    n = len(crystals)
    results = [Result(path=c.source or c.name, name=c.name) for c in crystals]
    contacts: list[Any] = [None] * n
    sites: list[Any] = [None] * n
    live = list(range(n))
    clock = time.perf_counter

    def stage(step) -> None:
        nonlocal live
        kept = []
        for k in live:
            t = clock()
            try:
                step(k)
                kept.append(k)
            except StructureError as exc:
                results[k].status, results[k].error = "error", str(exc)
            except Exception as exc:
                # A fresh result (no fields a stage half filled in), with the
                # path, name and time of the one it replaces.
                old = results[k]
                results[k] = Result(path=old.path, name=old.name, status="error",
                                    error=f"unexpected {type(exc).__name__}: {exc}", seconds=old.seconds)
            results[k].seconds += clock() - t
        live = kept

    def bonds(k: int) -> None:
        contacts[k] = _bonds_stage(crystals[k], options)

    def group(k: int) -> None:
        sites[k] = _sites_stage(crystals[k], contacts[k], options)

    def rest(k: int) -> None:
        _count_stage(crystals[k], contacts[k], sites[k], options, results[k])

    for step in (bonds, group, rest):
        stage(step)
    return results


def _bonds_stage(crystal: Crystal, options: Options):
    _validate(crystal)
    return find_contacts(crystal, options.criterion)


def _sites_stage(crystal: Crystal, contacts, options: Options):
    return find_sites(crystal) if options.symmetry else group_sites(crystal, contacts)


def _count_stage(crystal: Crystal, contacts, sites, options: Options, res: Result) -> None:
    """Count, diagnose and fill in the result (left untouched if a
    StructureError is raised)."""
    c = count(crystal, contacts, sites, options.anions, options.valence)
    groups = _site_groups(crystal, sites)
    values = per_atom(contacts, crystal.natoms, crystal.occupancy, groups[1], groups[3])
    fragile_labels = _fragile_sites(crystal, contacts, sites, c)
    verdict, found, components = diagnose(
        crystal, contacts, sites, c, fragile_labels, options.anions, options.valence, options.criterion
    )
    res.formula, z_cell = formula_of(crystal)
    res.spacegroup = f"{sites.spacegroup} ({sites.spacegroup_number})" if sites.spacegroup else ""
    res.verdict = verdict
    res.findings = found
    res.components = [comp.to_dict() for comp in components]
    if components:
        res.polyanion = describe(components)
    # Causes: what explains the verdict, most likely first (findings that only
    # add context, such as partial-occupancy or lone-pair-activity, are left out).
    res.causes = [f.slug for f in found if f.explains or f.rank > 0 or f.slug in ("metallic", "nothing-to-count")]
    res.causes = list(dict.fromkeys(res.causes))
    if c is not None:
        res.cations, res.anions, res.partition = c.cations, c.anions, c.reason
        res.vec_anion = _r3(c.vec_anion)
        res.aa_predicted = _r3(c.aa_predicted)
        res.aa_observed = _r3(c.aa_observed)
        res.cc_observed = _r3(c.cc_observed)
        res.residual = _r3(c.residual)
        res.electrons_per_formula = _r3(c.electrons / z_cell)
        res.anions_per_formula = _r3(c.n_anion / z_cell)
    res.sites = _site_rows(crystal, sites, c, groups, values)


def _validate(crystal: Crystal) -> None:
    if crystal.natoms == 0:
        raise StructureError("no atoms in the structure")
    # The volume as a triple product decides the usual case; near the limit
    # (or for a cell that is not finite) the determinant decides and is shown.
    (a1, a2, a3), (b1, b2, b3), (c1, c2, c3) = crystal.cell.tolist()
    terms = (a1 * (b2 * c3), a1 * (b3 * c2), a2 * (b1 * c3), a2 * (b3 * c1), a3 * (b1 * c2), a3 * (b2 * c1))
    v = abs(terms[0] - terms[1] - terms[2] + terms[3] + terms[4] - terms[5])
    if not v - 1e-12 * sum(map(abs, terms)) >= 2e-3:
        v = crystal.volume
        if not math.isfinite(v) or v < 1e-3:
            raise StructureError(f"cell volume is {v:.3g} A^3: the cell is degenerate")
    if crystal.numbers.min() < 1 or crystal.numbers.max() > 103:
        raise StructureError("unknown element in the structure")


def _fragile_sites(crystal, contacts, sites, c: Count | None) -> list[str]:
    """Sites where a contact that enters the count (anion-anion, or between two
    cations that may bond) changes within the criterion wobble."""
    if c is None:
        return []
    # The few fragile contacts first, then those of equal roles at both ends.
    (picked,) = contacts.fragile.nonzero()
    if not picked.size:
        return []
    # (a few contacts: walked as plain lists)
    role, site = c.role.tolist(), sites.site.tolist()
    found = set()
    for a, b, ionic in zip(contacts.i[picked].tolist(), contacts.j[picked].tolist(),
                           contacts.ionic_pair[picked].tolist()):
        if not ionic and role[a] == role[b]:
            found.add(site[a])
            found.add(site[b])
    if not found:
        return []
    rep = sites.representative
    return [crystal.label(int(rep[s])) for s in sorted(found)]


def _r3_values(x: np.ndarray) -> list[float | None]:
    """_r3 of each value of x, for values that are NaN or not negative and
    below 1000 (per_atom's ratios, below 2, and coordinations): round(v, 3),
    or None for NaN.  round(v, 3) is the float nearest to n / 1000 for the
    whole number n nearest to v * 1000 (ties to even).  numpy gives the same
    float wherever the float product v * 1000 is within 0.49 of a whole
    number: it is off the exact product by half a unit in its last place at
    most, below 6e-11, so that whole number is n.  round() itself takes the
    rest.  (No value is negative, so none rounds to -0.0.)"""
    y = x * 1000.0
    n = np.rint(y)
    out = [v if v == v else None for v in (n / 1000.0).tolist()]
    (doubt,) = (np.abs(y - n) > 0.49).nonzero()
    for k in doubt.tolist():
        out[k] = round(float(x[k]), 3)
    return out


def _site_groups(crystal, sites) -> tuple:
    """Atoms grouped by (site, element), numbered in order of their first
    atom: ((site, element) per atom, group number per atom, first atom of
    each group, atoms per group)."""
    keys = list(zip(sites.site.tolist(), crystal.numbers.tolist()))
    group_list, first = first_seen_and_index(keys)
    group = np.array(group_list, dtype=np.int64)
    return keys, group, first, np.bincount(group, minlength=len(first))


def _site_rows(crystal, sites, c: Count | None, groups: tuple, values: tuple) -> list[dict]:
    """One row per (site, element) group of `_site_groups`, in order of the
    first atom of each; values: `per_atom` of the groups."""
    keys, group, first, counts = groups
    coord, nearest, last, first_out, fragile = values
    # (groups of 8 or more: none among fewer atoms)
    crowded = (counts >= 8).nonzero()[0].tolist() if len(keys) >= 8 else []
    if np.count_nonzero(crystal.occupancy != 1.0):
        occ = group_mean(crystal.occupancy, group, counts, crowded).tolist()
    else:
        occ = [1.0] * len(first)
    ng = len(first)
    r3 = _r3_values(np.concatenate((coord, nearest, last, first_out)))
    coordination, near, lastb, firstu = r3[:ng], r3[ng:2 * ng], r3[2 * ng:3 * ng], r3[3 * ng:]
    frag = fragile.tolist()
    mult = None if sites.multiplicity is None else sites.multiplicity.tolist()
    if c is not None:
        bonds = group_mean(c.aa_bonds, group, counts, crowded).tolist()
        is_anion, group_of = c.role.tolist(), c.group_of.tolist()
        keep = c.closure.keep if c.closure.closes else {}
    rows = []
    for u, k in enumerate(first):
        s, z = keys[k]
        sym, _block, valence, keep_opts = elements.facts(z)
        role = bond_count = charge = None
        if c is not None:
            b = bonds[u]
            bond_count = _r3(b)
            if is_anion[k]:
                role = "anion"
                charge = _r3(b + valence - target(sym))
            else:
                role = "cation"
                g = group_of[k]
                if g in keep:
                    charge = _r3(valence - keep[g])
                elif keep_opts == {0: 0}:
                    charge = _r3(float(valence))
        o, fu, lb = occ[u], firstu[u], lastb[u]
        rows.append({
            "label": crystal.label(k),
            "element": sym,
            "multiplicity": None if mult is None else mult[s],
            "wyckoff": sites.wyckoff[s],
            "occupancy": o if o == 1.0 else round(o, 4),
            "role": role,
            "coordination": coordination[u],
            "bonds": bond_count,
            "formal_charge": charge,
            "nearest": near[u],
            "last_bonded": lb,
            "first_unbonded": fu,
            "fragile": frag[u],
            "gap": _r3(fu - lb) if fu and lb else None,
        })
    return rows


# ---------------------------------------------------------------------------
# Public API


def _options(anions=None, valence=None, criterion=None, options=None) -> Options:
    if options is not None:
        return options
    if isinstance(anions, str):
        anions = [a.strip() for a in anions.split(",") if a.strip()]
    return Options(anions=list(anions) if anions else None, valence=dict(valence or {}), criterion=criterion or Criterion())


def check(source, *, block: str | None = None, anions=None, valence=None, criterion=None, options=None) -> Result:
    """Check one structure: a file path, a pymatgen Structure, an ase Atoms or
    a Crystal. A file with several data blocks needs `block=` (or use
    `check_all`). Unreadable input raises StructureError."""
    from .read import read

    opts = _options(anions, valence, criterion, options)
    crystals = read(source, block=block)
    if len(crystals) != 1:
        names = ", ".join(c.name for c in crystals[:5])
        raise StructureError(f"{source} holds {len(crystals)} structures ({names}); pass block= or use check_all")
    return check_crystal(crystals[0], opts)


def iter_inputs(sources: Iterable) -> Iterator:
    """Expand directories into the structure files they hold."""
    from .read import iter_structure_files

    for src in sources:
        if isinstance(src, (str, Path)) and Path(src).is_dir():
            yield from iter_structure_files(src)
        else:
            yield src


def check_all(sources, *, anions=None, valence=None, criterion=None, options=None) -> list[Result]:
    """Check every structure in the given files, directories and objects; an
    unreadable input gives a Result with status 'error' and the rest go on."""
    from .read import read_blocks

    if isinstance(sources, (str, Path)) or not isinstance(sources, Iterable):
        sources = [sources]
    opts = _options(anions, valence, criterion, options)
    out = []
    for src in iter_inputs(sources):
        path = str(src) if isinstance(src, (str, Path)) else type(src).__name__
        t0 = time.perf_counter()
        try:
            # One item per data block: a bad block gives its own error row.
            crystals = read_blocks(src)
        except StructureError as exc:
            out.append(Result(path=path, status="error", error=str(exc), seconds=time.perf_counter() - t0))
            continue
        except Exception as exc:  # a reader bug must not lose the other inputs
            out.append(Result(path=path, status="error", error=f"unexpected {type(exc).__name__}: {exc}", seconds=time.perf_counter() - t0))
            continue
        for cr in crystals:
            if isinstance(cr, StructureError):
                where = getattr(cr, "source", "") or path
                out.append(Result(path=where, status="error", error=str(cr), seconds=time.perf_counter() - t0))
                continue
            t1 = time.perf_counter()
            try:
                out.append(check_crystal(cr, opts))
            except Exception as exc:  # a bug in one structure must not lose the rest
                out.append(Result(path=cr.source or path, name=cr.name, status="error",
                                  error=f"unexpected {type(exc).__name__}: {exc}", seconds=time.perf_counter() - t1))
    return out
