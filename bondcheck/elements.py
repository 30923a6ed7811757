"""Element data used by the count: radii, electronegativity, valence electrons.

The numbers come from bondcheck/data/elements.json, generated from ase
(covalent radii of Cordero et al., Dalton Trans. 2008, 2832) and pymatgen
(Pauling electronegativity, oxidation states) by tools/make_element_table.py,
so that checking a structure never imports pymatgen.
"""
from __future__ import annotations

import json
from functools import lru_cache
from importlib import resources

import numpy as np

# Lanthanides that commonly stay divalent, keeping one electron (4f7 Eu2+,
# 4f14 Yb2+, Sm2+): common practice, no source.
DIVALENT_LANTHANIDES = frozenset({"Sm", "Eu", "Yb"})
# Lanthanides that also reach 4+ (CeO2, PrO2, TbO2, Na2CeO3, BaCeO3), beside
# oxide and fluoride anions only: common practice, no source.  They count 3
# valence electrons like the other lanthanides; the count lets them give a
# fourth where every anion is O or F (count._group_options).  They are the
# lanthanides whose ICSD oxidation states in elements.json include 4; a test
# keeps the two in step.
TETRAVALENT_LANTHANIDES = frozenset({"Ce", "Pr", "Tb"})
FOUR_PLUS_ANIONS = frozenset({"O", "F"})  # the anions beside which they may be 4+
# Early actinides behave like d-block metals for counting (Th4+, Pa5+, U6+
# maximum states): common practice, no source.
DLIKE_ACTINIDES = {"Th": 4, "Pa": 5, "U": 6}


@lru_cache(maxsize=1)
def table() -> dict[str, dict]:
    with resources.files("bondcheck").joinpath("data/elements.json").open("r") as fh:
        return json.load(fh)


@lru_cache(maxsize=1)
def symbols() -> list[str]:
    """symbols()[Z] is the element symbol; index 0 is 'X'."""
    out = ["X"] * 104
    for sym, row in table().items():
        out[row["Z"]] = sym
    return out


@lru_cache(maxsize=1)
def numbers() -> dict[str, int]:
    return {sym: row["Z"] for sym, row in table().items()} | {"D": 1, "T": 1}


def _by_z(key: str, default: float) -> np.ndarray:
    arr = np.full(104, default, dtype=float)
    for row in table().values():
        v = row[key]
        arr[row["Z"]] = default if v is None else v
    return arr


@lru_cache(maxsize=1)
def radii() -> np.ndarray:
    """Covalent radius by atomic number, angstrom."""
    return _by_z("radius", 1.5)


@lru_cache(maxsize=1)
def pauling() -> np.ndarray:
    """Pauling electronegativity by atomic number (noble gases without one: 4.0,
    so that a noble-gas element is never taken for a cation)."""
    return _by_z("pauling", 4.0)


@lru_cache(maxsize=1)
def pauling_list() -> list[float]:
    """pauling() as a list of Python floats, quicker to index and compare on
    the per-structure path."""
    return pauling().tolist()


def valence(sym: str) -> int:
    """Valence electrons given up or shared in the count.

    Main group: s + p electrons; d block: group number (Zn, Cd, Hg: 2);
    lanthanides and late actinides: 3 (Ce, Pr, Tb: see
    TETRAVALENT_LANTHANIDES); Th, Pa, U: 4, 5, 6.
    """
    row = table()[sym]
    g, block = row["group"], row["block"]
    if sym == "He":
        return 2
    if block == "s":
        return g
    if block == "p":
        return g - 10
    if block == "d":
        return 2 if g == 12 else g
    return DLIKE_ACTINIDES.get(sym, 3)


def _per_z(func, dtype) -> np.ndarray:
    """func(symbol) for every element, as an array indexed by atomic number."""
    arr = np.zeros(104, dtype=dtype)
    for sym, row in table().items():
        arr[row["Z"]] = func(sym)
    return arr


@lru_cache(maxsize=1)
def valence_by_z() -> np.ndarray:
    return _per_z(valence, float)


def block(sym: str) -> str:
    return table()[sym]["block"]


@lru_cache(maxsize=1)
def d_block_by_z() -> np.ndarray:
    return _per_z(lambda sym: block(sym) == "d", bool)


def is_electropositive(sym: str) -> bool:
    """s-block metals (not H), group 3 and the f block: atoms that give their
    electrons away and do not bond to each other."""
    row = table()[sym]
    if sym in ("H", "He"):
        return False
    return row["block"] in ("s", "f") or row["group"] == 3


@lru_cache(maxsize=1)
def electropositive_by_z() -> np.ndarray:
    return _per_z(is_electropositive, bool)


def can_be_anion(sym: str) -> bool:
    """p-block elements, H and noble gases can take the anion role by default;
    metals of the s, d and f blocks only when they are the most electronegative
    element present (aurides, platinides)."""
    return sym == "H" or table()[sym]["block"] == "p" or sym == "He"


@lru_cache(maxsize=1)
def capable_by_z() -> np.ndarray:
    return _per_z(can_be_anion, bool)


def oxidation_states(sym: str) -> tuple[frozenset[int], frozenset[int]]:
    """(common, known): common = pymatgen's common states plus those seen in
    the ICSD; known = every state pymatgen lists."""
    row = table()[sym]
    common = frozenset(row["common_ox"]) | frozenset(row["icsd_ox"])
    return common, common | frozenset(row["all_ox"])


def keep_options(sym: str) -> dict[int, int]:
    """Electrons a cation of this element may keep for itself, mapped to a cost
    (0 for a common oxidation state, 1 for a rarer known one).

    s block and group 3: nothing. Sm, Eu, Yb: 0 or 1. d block and Th-U: the
    group number minus a known positive (or zero) oxidation state. p block:
    0, or an ns2 lone pair when the element has the state (valence - 2).
    """
    v = valence(sym)
    row = table()[sym]
    if sym in DIVALENT_LANTHANIDES:
        return {0: 0, 1: 0}
    if row["block"] in ("s", "f") and sym not in DLIKE_ACTINIDES or row["group"] == 3 and row["block"] == "d":
        return {0: 0}
    common, known = oxidation_states(sym)
    if row["block"] == "p":
        # A lone pair costs a little, more on light elements (N, P, S, Cl
        # rarely keep one in solids), so that d electrons are preferred when
        # both close a count.
        opts = {0: 0}
        light = 0.3 if row["row"] <= 3 else 0.0
        if (v - 2) in common:
            opts[2] = 0.2 + light
        elif (v - 2) in known and v - 2 > 0:
            opts[2] = 1 + light
        return opts
    opts = {}
    for ox in sorted(known):
        if 0 <= ox <= v:
            opts[v - ox] = 0 if ox in common else 1
    return opts or {0: 1}


_FACTS: dict[int, tuple] = {}


def facts(z: int) -> tuple:
    """(symbol, block, valence, keep options) of the element of atomic number
    z, cached for the per-structure path; the keep options dict is shared and
    must not be changed."""
    f = _FACTS.get(z)
    if f is None:
        sym = symbols()[z]
        f = _FACTS[z] = (sym, block(sym), valence(sym), keep_options(sym))
    return f
