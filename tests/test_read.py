"""Tests of the read stage: files and objects in, Crystal records out."""
from __future__ import annotations

import gzip
import json
import math
import os
import random
import re
import subprocess
import sys
import warnings
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from bondcheck.read import iter_structure_files, read, read_cif_bytes, species
from bondcheck.record import Crystal, StructureError

HERE = Path(__file__).resolve().parent
BAD = HERE / "data" / "bad"
CORPUS = HERE.parents[0] / ".." / "shared" / "corpus"


def _minerals_dir() -> Path:
    import ase
    return Path(ase.__file__).parent / "test" / "testdata" / "minerals"


def _pymatgen_structures_dir() -> Path:
    import pymatgen.util
    return Path(pymatgen.util.__file__).parent / "structures"


def composition(c: Crystal) -> dict[int, float]:
    """Atoms per element in the cell, each entry weighted by its occupancy."""
    out: Counter = Counter()
    for z, o in zip(c.numbers.tolist(), c.occupancy.tolist()):
        out[z] += o
    return {z: round(v, 6) for z, v in out.items()}


def pymatgen_cif(path):
    from pymatgen.io.cif import CifParser
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return CifParser(str(path)).parse_structures(primitive=False)[0]


def pymatgen_composition(s) -> dict[int, float]:
    return {el.Z: round(v, 6) for el, v in s.composition.element_composition.items()}


def assert_valid(c: Crystal) -> None:
    n = c.natoms
    assert c.cell.shape == (3, 3) and c.cell.dtype == np.float64
    assert c.frac.shape == (n, 3) and c.frac.dtype == np.float64
    assert c.numbers.shape == (n,) and c.numbers.dtype == np.int64
    assert c.occupancy.shape == (n,) and c.charges.shape == (n,) and c.labels.shape == (n,)
    assert np.all(c.frac >= 0.0) and np.all(c.frac < 1.0)
    assert np.all(c.occupancy > 0.0) and np.all(c.occupancy <= 1.0)
    assert np.all(c.numbers >= 1)
    assert np.linalg.det(c.cell) > 0  # right handed


def cif_text(atoms: str, *, symmetry: str = "_symmetry_space_group_name_H-M 'P 1'",
             cell=(5.0, 5.0, 5.0, 90, 90, 90), name: str = "t",
             columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z")) -> str:
    a, b, c, al, be, ga = cell
    head = (f"data_{name}\n_cell_length_a {a}\n_cell_length_b {b}\n_cell_length_c {c}\n"
            f"_cell_angle_alpha {al}\n_cell_angle_beta {be}\n_cell_angle_gamma {ga}\n")
    loop = "loop_\n" + "".join(f"_atom_site_{k}\n" for k in columns)
    return head + symmetry + "\n" + loop + atoms.strip() + "\n"


def one(text: str) -> Crystal:
    crystals = read_cif_bytes(text.encode(), "inline.cif")
    assert len(crystals) == 1
    assert_valid(crystals[0])
    return crystals[0]


# ---------------------------------------------------------------------------
# real files: ase's bundled COD minerals
# ---------------------------------------------------------------------------

# Atoms in the conventional cell as written in each file.  The Z values are
# those of the structure types, common practice, no source.
MINERALS = [
    # ase test data, COD 1010930, breithauptite NiSb, NiAs type, Z=2
    ("cod_1010930.cif", "P 63/m m c", {28: 2, 51: 2}),
    # ase test data, COD 1010995, moissanite 3C SiC, zinc-blende type, Z=4
    ("cod_1010995.cif", "F -4 3 m", {14: 4, 6: 4}),
    # ase test data, COD 9004218, cobaltite CoAsS, Pca21, Z=4
    ("cod_9004218.cif", "P c a 21", {27: 4, 33: 4, 16: 4}),
    # ase test data, COD 9007640, heazlewoodite Ni3S2, R32 rhombohedral axes, Z=1
    ("cod_9007640.cif", "R 3 2 :R", {28: 3, 16: 2}),
    # ase test data, COD 9007661, molybdenite-3R MoS2, R3m hexagonal axes, Z=3
    ("cod_9007661.cif", "R 3 m :H", {42: 3, 16: 6}),
    # ase test data, COD 9017338, alpha-cristobalite SiO2, P41212, Z=4
    ("cod_9017338.cif", "P 41 21 2", {14: 4, 8: 8}),
]


@pytest.mark.parametrize("fname, spacegroup, expected", MINERALS)
def test_minerals_atom_counts(fname, spacegroup, expected):
    crystals = read(_minerals_dir() / fname)
    assert len(crystals) == 1
    c = crystals[0]
    assert_valid(c)
    assert composition(c) == expected
    assert c.meta["spacegroup"] == spacegroup
    assert c.meta["format"] == "cif"
    assert c.source == str(_minerals_dir() / fname)
    assert c.name == fname[4:-4]  # COD block names are the COD numbers


@pytest.mark.parametrize("path", sorted(_minerals_dir().glob("*.cif")), ids=lambda p: p.name)
def test_minerals_match_pymatgen(path):
    # cross-check with pymatgen's CifParser on the same file: same contents
    # of the conventional cell, same volume
    c = read(path)[0]
    s = pymatgen_cif(path)
    assert composition(c) == pymatgen_composition(s)
    assert c.volume == pytest.approx(s.volume, rel=1e-9)


@pytest.mark.parametrize("path", sorted(_minerals_dir().glob("*.cif")), ids=lambda p: p.name)
def test_cell_matches_ase(path):
    from ase.geometry import cell_to_cellpar, cellpar_to_cell
    c = read(path)[0]
    s = pymatgen_cif(path)
    params = s.lattice.parameters
    ref = cellpar_to_cell(params)
    # the same lattice up to a rotation: equal metric tensors ...
    np.testing.assert_allclose(c.cell @ c.cell.T, ref @ ref.T, atol=1e-9)
    # ... and with the same convention (a along x, b in the xy plane) the same matrix
    np.testing.assert_allclose(c.cell, ref, atol=1e-9)
    np.testing.assert_allclose(cell_to_cellpar(c.cell), params, atol=1e-9)
    assert c.volume == pytest.approx(abs(np.linalg.det(ref)), rel=1e-12)
    assert np.linalg.det(c.cell) > 0


def test_mineral_charges_from_type_symbols():
    # ase test data, COD 1010930 writes type symbols Ni3+ and Sb3-
    c = read(_minerals_dir() / "cod_1010930.cif")[0]
    assert set(zip(c.numbers.tolist(), c.charges.tolist())) == {(28, 3.0), (51, -3.0)}
    assert set(c.labels.tolist()) == {"Ni1", "Sb1"}


# ---------------------------------------------------------------------------
# pymatgen JSON structures and objects
# ---------------------------------------------------------------------------

def test_pymatgen_json_partial_occupancy():
    from pymatgen.core import Structure
    path = _pymatgen_structures_dir() / "Li10GeP2S12.json"
    c = read(path)[0]
    assert_valid(c)
    s = Structure.from_file(str(path))
    assert composition(c) == pymatgen_composition(s)
    assert c.occupancy.min() < 1.0
    # the mixed Ge/P site gives two entries at the same place
    n_entries = sum(len(site.species) for site in s)
    assert c.natoms == n_entries > len(s)
    assert c.name == "Li10GeP2S12" and c.source == str(path)
    assert c.meta["format"] == "pymatgen"


@pytest.mark.parametrize("fname", ["TlBiSe2.json", "SrTiO3.json", "CsCl.json", "Li2O.json"])
def test_pymatgen_json_matches(fname):
    from pymatgen.core import Structure
    path = _pymatgen_structures_dir() / fname
    c = read(path)[0]
    assert_valid(c)
    s = Structure.from_file(str(path))
    assert composition(c) == pymatgen_composition(s)
    assert c.volume == pytest.approx(s.volume)


def test_pymatgen_oxidation_states_become_charges():
    # pymatgen test structure SrTiO3.json carries Sr2+, Ti4+, O2-
    c = read(_pymatgen_structures_dir() / "SrTiO3.json")[0]
    assert dict(zip(c.numbers.tolist(), c.charges.tolist())) == {38: 2.0, 22: 4.0, 8: -2.0}


def test_pymatgen_objects():
    from pymatgen.core import IStructure, Lattice, Structure
    s = Structure(Lattice.cubic(4.2), [{"Ga": 0.5, "Ge": 0.5}, "As"], [[0, 0, 0], [0.25, 0.25, 1.25]])
    for obj in (s, IStructure.from_sites(s)):
        c = read(obj)[0]
        assert_valid(c)
        assert composition(c) == {31: 0.5, 32: 0.5, 33: 1.0}
        assert np.allclose(c.frac[2], [0.25, 0.25, 0.25])
        assert np.all(np.isnan(c.charges))
    so = Structure(Lattice.cubic(4.2), ["Na+", "Cl-"], [[0, 0, 0], [0.5, 0.5, 0.5]])
    assert read(so)[0].charges.tolist() == [1.0, -1.0]


def test_pymatgen_molecule_rejected():
    from pymatgen.core import Molecule
    with pytest.raises(StructureError, match="no periodic cell"):
        read(Molecule(["O", "H"], [[0, 0, 0], [0, 0, 0.97]]))


# ---------------------------------------------------------------------------
# ase objects and the formats ase reads
# ---------------------------------------------------------------------------

MIXED = cif_text("""
Ga1 Ga 0 0 0 0.5
Ge1 Ge 0 0 0 0.5
As1 As 0.25 0.25 0.25 1
""", symmetry="_symmetry_space_group_name_H-M 'F -4 3 m'", cell=(5.65, 5.65, 5.65, 90, 90, 90),
    columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy"))


def test_mixed_site_two_entries():
    c = one(MIXED)
    assert composition(c) == {31: 2.0, 32: 2.0, 33: 4.0}
    ga, ge = c.frac[c.numbers == 31], c.frac[c.numbers == 32]
    np.testing.assert_allclose(ga, ge)  # same positions
    assert set(c.occupancy[c.numbers == 31]) == {0.5}


def test_ase_atoms_with_occupancy(tmp_path):
    import ase.io
    path = tmp_path / "mixed.cif"
    path.write_text(MIXED)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        atoms = ase.io.read(str(path))
    assert "occupancy" in atoms.info  # ase keeps the occupancies here
    c = read(atoms)[0]
    assert_valid(c)
    assert composition(c) == {31: 2.0, 32: 2.0, 33: 4.0}
    assert c.meta["format"] == "ase"


def test_ase_atoms_plain():
    from ase.build import bulk
    c = read(bulk("Si", "diamond", a=5.43, cubic=True))[0]
    assert_valid(c)
    assert composition(c) == {14: 8.0}
    assert np.all(c.occupancy == 1.0) and np.all(np.isnan(c.charges))
    assert c.labels.tolist() == [""] * 8


def test_ase_non_periodic_rejected():
    from ase import Atoms
    with pytest.raises(StructureError, match="no periodic cell"):
        read(Atoms("H2O", positions=[[0, 0, 0], [0.76, 0.59, 0], [-0.76, 0.59, 0]]))


@pytest.mark.parametrize("name", ["POSCAR", "CONTCAR", "POSCAR_relaxed", "GaAs.vasp", "GaAs.poscar"])
def test_vasp_files(tmp_path, name):
    import ase.io
    from ase.build import bulk
    atoms = bulk("GaAs", "zincblende", a=5.65, cubic=True)
    path = tmp_path / name
    ase.io.write(str(path), atoms, format="vasp", direct=True)
    c = read(path)[0]
    assert_valid(c)
    assert composition(c) == {31: 4.0, 33: 4.0}
    np.testing.assert_allclose(c.cell, atoms.cell[:], atol=1e-8)
    assert c.source == str(path)


def test_extxyz_frames(tmp_path):
    import ase.io
    from ase.build import bulk
    frames = [bulk("Cu", "fcc", a=3.6, cubic=True), bulk("NaCl", "rocksalt", a=5.64)]
    path = tmp_path / "frames.extxyz"
    ase.io.write(str(path), frames, format="extxyz")
    crystals = read(path)
    assert [composition(c) for c in crystals] == [{29: 4.0}, {11: 1.0, 17: 1.0}]
    assert [c.source for c in crystals] == [f"{path}#0", f"{path}#1"]
    assert [c.name for c in crystals] == ["frames#0", "frames#1"]
    assert read(path, block="frames#1")[0].natoms == 2


def test_crystal_passes_through():
    c = one(MIXED)
    assert read(c)[0] is c


def test_unsupported_object():
    with pytest.raises(StructureError, match="cannot read an object"):
        read(object())


def test_missing_file(tmp_path):
    with pytest.raises(StructureError, match="no such file"):
        read(tmp_path / "nothing.cif")
    with pytest.raises(StructureError, match="directory"):
        read(str(tmp_path) + os.sep + ".")


# ---------------------------------------------------------------------------
# CIF quirks, written inline
# ---------------------------------------------------------------------------

NACL_ATOMS = "Na1 Na 0 0 0\nCl1 Cl 0.5 0.5 0.5"
P21C_OPS = ["x,y,z", "-x,y+1/2,-z+1/2", "-x,-y,-z", "x,-y+1/2,z+1/2"]


def _ops_loop(tag: str, ops) -> str:
    return f"loop_\n{tag}\n" + "".join(f"'{op}'\n" for op in ops)


def test_operators_under_either_tag():
    atoms = "Fe1 Fe 0.1 0.2 0.3\nO1 O 0 0 0"
    old = one(cif_text(atoms, symmetry=_ops_loop("_symmetry_equiv_pos_as_xyz", P21C_OPS)))
    new = one(cif_text(atoms, symmetry=_ops_loop("_space_group_symop_operation_xyz", P21C_OPS)))
    name = one(cif_text(atoms, symmetry="_space_group_name_H-M_alt 'P 1 21/c 1'"))
    for c in (old, new, name):
        assert composition(c) == {26: 4.0, 8: 2.0}  # general position 4e, special 2a
    np.testing.assert_allclose(old.frac, new.frac)
    np.testing.assert_allclose(sorted(map(tuple, old.frac)), sorted(map(tuple, name.frac)), atol=1e-12)
    assert old.meta["symmetry"] == "operators" and name.meta["symmetry"] == "hm"


def test_operators_with_ids_and_dotted_tags():
    sym = ("loop_\n_space_group_symop.id\n_space_group_symop.operation_xyz\n"
           + "".join(f"{i} '{op}'\n" for i, op in enumerate(P21C_OPS, 1)))
    c = one(cif_text("Fe1 Fe 0.1 0.2 0.3", symmetry=sym))
    assert c.natoms == 4


def test_only_hm_name():
    c = one(cif_text(NACL_ATOMS, symmetry="_symmetry_space_group_name_H-M 'F m -3 m'",
                     cell=(5.64, 5.64, 5.64, 90, 90, 90)))
    assert composition(c) == {11: 4.0, 17: 4.0}
    assert c.meta["spacegroup"] == "F m -3 m" and c.meta["nsymops"] == 192


def test_only_hall_symbol():
    c = one(cif_text(NACL_ATOMS, symmetry="_space_group_name_Hall '-F 4 2 3'",
                     cell=(5.64, 5.64, 5.64, 90, 90, 90)))
    assert composition(c) == {11: 4.0, 17: 4.0}
    assert c.meta["symmetry"] == "hall"


def test_only_space_group_number():
    c = one(cif_text(NACL_ATOMS, symmetry="_symmetry_Int_Tables_number 225",
                     cell=(5.64, 5.64, 5.64, 90, 90, 90)))
    assert composition(c) == {11: 4.0, 17: 4.0}


def test_no_symmetry_given_means_p1():
    c = one(cif_text(NACL_ATOMS, symmetry=""))
    assert c.natoms == 2 and c.meta["symmetry"] == "none"


@pytest.mark.parametrize("xyz, setting", [("0.125 0.125 0.125", "F d -3 m:2"), ("0 0 0", "F d -3 m:1")])
def test_origin_choice_from_name_alone(xyz, setting):
    # diamond: Si on 8a, at 1/8,1/8,1/8 in origin choice 2 and at 0,0,0 in
    # origin choice 1; the other choice would put the atoms on 16c/16d
    c = one(cif_text(f"Si1 Si {xyz}", symmetry="_symmetry_space_group_name_H-M 'F d -3 m'",
                     cell=(5.43, 5.43, 5.43, 90, 90, 90)))
    assert c.natoms == 8
    assert c.meta["setting"] == setting


@pytest.mark.parametrize("name, n_si", [("F d -3 m Z", 8), ("F d -3 m S", 16), ("F d -3 m :2", 8)])
def test_origin_suffixes(name, n_si):
    # Si at 1/8,1/8,1/8 is 8a in origin choice 2 (Z) and 16c/16d-like in origin choice 1 (S)
    c = one(cif_text("Si1 Si 0.125 0.125 0.125", symmetry=f"_symmetry_space_group_name_H-M '{name}'",
                     cell=(5.43, 5.43, 5.43, 90, 90, 90)))
    assert c.natoms == n_si


def test_subscripts_with_underscore():
    c = one(cif_text("Fe1 Fe 0.1 0.2 0.3", symmetry="_symmetry_space_group_name_H-M 'P2_1/c'"))
    assert c.natoms == 4 and c.meta["setting"] == "P 1 21/c 1"


def test_rhombohedral_settings_from_name():
    # Bi, A7 type: R-3m, 6c in hexagonal axes, 2c in rhombohedral axes
    hexa = one(cif_text("Bi1 Bi 0 0 0.2339", symmetry="_symmetry_space_group_name_H-M 'R -3 m'",
                        cell=(4.546, 4.546, 11.862, 90, 90, 120)))
    rhom = one(cif_text("Bi1 Bi 0.2339 0.2339 0.2339", symmetry="_symmetry_space_group_name_H-M 'R -3 m'",
                        cell=(4.746, 4.746, 4.746, 57.2, 57.2, 57.2)))
    assert hexa.natoms == 6 and rhom.natoms == 2


def test_non_standard_setting_uses_file_operators():
    # an inversion centre at (1/4, 0, 0): not a tabulated setting
    c = one(cif_text("Fe1 Fe 0.1 0.2 0.3", symmetry=_ops_loop("_symmetry_equiv_pos_as_xyz",
                                                              ["x,y,z", "-x+1/2,-y,-z"])))
    np.testing.assert_allclose(c.frac, [[0.1, 0.2, 0.3], [0.4, 0.8, 0.7]], atol=1e-12)


def test_incomplete_operator_list_is_completed():
    # C-centred P-1 with the centred inversion left out
    c = one(cif_text("Fe1 Fe 0.1 0.2 0.3", symmetry=_ops_loop(
        "_symmetry_equiv_pos_as_xyz", ["x,y,z", "-x,-y,-z", "x+1/2,y+1/2,z"])))
    assert c.natoms == 4
    assert c.meta["symmetry_completed"] is True and c.meta["nsymops"] == 4


def test_magnetic_cif_operators(tmp_path):
    text = cif_text("Fe1 Fe 0 0 0\nO1 O 0.25 0.25 0.25", symmetry=(
        '_space_group_magn.name_BNS "P_I m -3 m"\n'
        "loop_\n_space_group_symop_magn_operation.id\n_space_group_symop_magn_operation.xyz\n"
        "1 x,y,z,+1\n2 -x,-y,-z,+1\n"
        "loop_\n_space_group_symop_magn_centering.id\n_space_group_symop_magn_centering.xyz\n"
        "1 x,y,z,+1\n2 x+1/2,y+1/2,z+1/2,-1\n"))
    path = tmp_path / "afm.mcif"
    path.write_text(text)
    c = read(path)[0]
    assert composition(c) == {26: 2.0, 8: 2.0}
    assert c.meta["spacegroup"] == "P_I m -3 m"


def test_special_positions_merged_despite_rounding():
    # NiAs type with 1/3, 2/3 written to three digits: the images of Sb on 2c
    # land a few thousandths of an angstrom apart and are one atom each
    c = one(cif_text("Ni1 Ni 0 0 0\nSb1 Sb 0.333 0.667 0.25",
                     symmetry="_symmetry_space_group_name_H-M 'P 63/m m c'",
                     cell=(3.94, 3.94, 5.14, 90, 90, 120)))
    assert composition(c) == {28: 2.0, 51: 2.0}


def test_split_site_near_special_position_kept():
    # a half-occupied O 0.3 A off a mirror (z=0 in Pmmm): two alternative
    # positions, 0.6 A apart, each with its occupancy
    c = one(cif_text("O1 O 0 0 0.05 0.5", symmetry="_symmetry_space_group_name_H-M 'P m m m'",
                     cell=(4.0, 4.0, 6.0, 90, 90, 90),
                     columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy")))
    assert c.natoms == 2 and composition(c) == {8: 1.0}


def test_charges_in_type_symbols():
    c = one(cif_text("""
Sb1 Sb3- 0 0 0
O1 O2- 0.1 0 0
Fe1 Fe2+ 0.2 0 0
Li1 Li+ 0.3 0 0
Mn1 Mn3.5+ 0.4 0 0
Cu1 Cu 0.5 0 0
Ti1 Ti+4 0.6 0 0
"""))
    assert c.numbers.tolist() == [51, 8, 26, 3, 25, 29, 22]
    np.testing.assert_array_equal(c.charges, [-3, -2, 2, 1, 3.5, np.nan, 4])


def test_charges_from_atom_type_loop():
    c = one(cif_text("Fe1 Fe 0 0 0\nO1 O 0.5 0.5 0.5") + (
        "loop_\n_atom_type_symbol\n_atom_type_oxidation_number\nFe 2\nO -2\n"))
    assert c.charges.tolist() == [2.0, -2.0]


def test_deuterium_and_tritium():
    c = one(cif_text("D1 D 0 0 0\nT1 T 0.5 0.5 0.5\nH1 H 0.25 0.25 0.25"))
    assert c.numbers.tolist() == [1, 1, 1]


def test_labels_kept_and_non_element_labels():
    c = one(cif_text("M1 Fe 0 0 0\nX2 O 0.5 0.5 0.5", symmetry="_symmetry_space_group_name_H-M 'P -1'"))
    assert c.numbers.tolist() == [26, 8]  # P-1 special positions 1a, 1h
    assert c.labels.tolist() == ["M1", "X2"]


def test_element_from_label_without_type_symbol():
    c = one(cif_text("Fe1a 0 0 0\nO1 0.5 0 0\nOw3 0 0.5 0\nSB2 0 0 0.5\nCL1 0.5 0.5 0",
                     columns=("label", "fract_x", "fract_y", "fract_z")))
    assert c.numbers.tolist() == [26, 8, 8, 51, 17]
    assert np.all(np.isnan(c.charges))


def test_uncertainties_and_missing_occupancy():
    c = one(cif_text("""
Ga1 Ga 0.1234(5) 0.25 0.5(1) 0.50(1)
Ge1 Ge 0.1234(5) 0.25 0.5(1) ?
As1 As 0.7 0.8 0.9 .
""", cell=("5.431(2)", "5.432(12)", 5.433, "90.0(1)", 90, 90),
        columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy")))
    np.testing.assert_allclose(c.frac[0], [0.1234, 0.25, 0.5])
    assert c.occupancy.tolist() == [0.5, 1.0, 1.0]
    np.testing.assert_allclose(np.diag(c.cell), [5.431, 5.432, 5.433])


def test_occupancy_column_absent_means_one():
    c = one(cif_text(NACL_ATOMS))
    assert c.occupancy.tolist() == [1.0, 1.0]


def test_occupancy_slightly_above_one_is_clipped():
    c = one(cif_text("Fe1 Fe 0 0 0 1.0004",
                     columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy")))
    assert c.occupancy.tolist() == [1.0]


def test_coordinates_wrapped_into_unit_cell():
    c = one(cif_text("Fe1 Fe -0.25 1.25 2.0\nO1 O -1e-19 0.999999 -0.5"))
    np.testing.assert_allclose(c.frac, [[0.75, 0.25, 0.0], [0.0, 0.999999, 0.5]])
    assert np.all(c.frac < 1.0)


def test_missing_angles_default_to_90():
    text = "data_x\n_cell_length_a 3\n_cell_length_b 4\n_cell_length_c 5\n" + \
        "loop_\n_atom_site_label\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\nFe1 0 0 0\n"
    np.testing.assert_allclose(one(text).cell, np.diag([3.0, 4.0, 5.0]))


def test_non_utf8_comment_bom_and_crlf():
    text = cif_text(NACL_ATOMS)
    data = ("\ufeff# written by J. M\u00fcller\r\n" + text.replace("\n", "\r\n")).encode("utf-8")
    assert one(data.decode("utf-8")).natoms == 2
    latin1 = b"# Sch\xf6n, G\xe9rard \xa9\n" + text.encode() + b"_publ_section_title 'Caf\xe9'\n"
    c = read_cif_bytes(latin1, "latin1.cif")[0]
    assert composition(c) == {11: 1.0, 17: 1.0}


def test_dummy_atoms_skipped():
    c = one(cif_text("Fe1 Fe 0 0 0 d\nQ1 Q 0.5 0.5 0.5 dum",
                     columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "calc_flag")))
    assert c.numbers.tolist() == [26]


def test_unterminated_quote_in_publication_field():
    # a comma right after a closing quote keeps it from closing (CIF 1.1),
    # a common slip in author lists; the structure must still be read
    text = cif_text(NACL_ATOMS).replace(
        "loop_", "loop_\n_publ_author_name\n 'A. Author', \n 'B. Author'\nloop_", 1)
    c = one(text)
    assert c.natoms == 2 and c.meta["quote_repairs"] == 1


def test_atom_site_as_single_pairs():
    text = ("data_x\n_cell_length_a 3\n_cell_length_b 3\n_cell_length_c 3\n_cell_angle_alpha 90\n"
            "_cell_angle_beta 90\n_cell_angle_gamma 90\n_atom_site_label Po1\n_atom_site_type_symbol Po\n"
            "_atom_site_fract_x 0\n_atom_site_fract_y 0\n_atom_site_fract_z 0\n")
    assert one(text).numbers.tolist() == [84]


def test_gzipped_cif(tmp_path):
    path = tmp_path / "nacl.cif.gz"
    path.write_bytes(gzip.compress(cif_text(NACL_ATOMS).encode()))
    assert read(path)[0].natoms == 2


def test_cif_content_with_other_name(tmp_path):
    path = tmp_path / "structure.txt"
    path.write_text("# a CIF saved under another name\n" + cif_text(NACL_ATOMS))
    assert read(path)[0].natoms == 2


MULTI = ("data_global\n_publ_section_title 'Two phases'\n\n"
         + cif_text(NACL_ATOMS, name="NaCl") + "\n"
         + cif_text("Cs1 Cs 0 0 0\nCl1 Cl 0.5 0.5 0.5", name="CsCl", cell=(4.1, 4.1, 4.1, 90, 90, 90)))


def test_several_blocks(tmp_path):
    path = tmp_path / "two.cif"
    path.write_text(MULTI)
    crystals = read(path)
    assert [c.name for c in crystals] == ["NaCl", "CsCl"]
    assert [c.source for c in crystals] == [f"{path}#NaCl", f"{path}#CsCl"]
    only = read(path, block="CsCl")
    assert len(only) == 1 and composition(only[0]) == {55: 1.0, 17: 1.0}
    assert read(path, block="cscl")[0].name == "CsCl"  # block names are case-insensitive
    with pytest.raises(StructureError, match="no data block named 'KCl'"):
        read(path, block="KCl")


def test_bad_block_named_in_message(tmp_path):
    path = tmp_path / "two.cif"
    path.write_text(MULTI.replace("Cs1 Cs", "Cs1 Xx"))
    with pytest.raises(StructureError, match="data block 'CsCl': unknown element symbol 'Xx'"):
        read(path)
    assert read(path, block="NaCl")[0].natoms == 2


# ---------------------------------------------------------------------------
# bad input
# ---------------------------------------------------------------------------

# Every file in tests/data/bad with the words its error must contain (and,
# for the files that once broke the reader, what went wrong).  Files whose
# error comes from a later stage ("stage": "check") are read without error
# here; tests/test_hostile.py runs all of them through check_all.
BAD_REASONS = json.loads((HERE / "data" / "bad_reasons.json").read_text())
BAD_FILES = sorted((name, entry["reason"]) for name, entry in BAD_REASONS.items()
                   if entry.get("stage", "read") == "read")


@pytest.mark.parametrize("fname, words", BAD_FILES)
def test_bad_files(fname, words):
    with pytest.raises(StructureError) as info:
        read(BAD / fname)
    msg = str(info.value)
    assert words in msg
    assert "\n" not in msg and len(msg) < 200


def test_every_bad_file_is_covered():
    assert {p.name for p in BAD.iterdir()} == set(BAD_REASONS)


def test_structure_error_is_value_error():
    with pytest.raises(ValueError):
        read(BAD / "empty.cif")


@pytest.mark.parametrize("symbol", ["OH", "H2O", "NH4", "Va", "X", "Xx"])
def test_non_element_type_symbols(symbol):
    with pytest.raises(StructureError, match=f"unknown element symbol '{symbol}'"):
        one(cif_text(f"A1 {symbol} 0 0 0"))


def test_species_parser():
    assert species("Sb3-") == (51, -3.0)
    assert species("FE2+") == (26, 2.0)
    assert species("O-2") == (8, -2.0)
    assert species("Fe1")[0] == 26 and math.isnan(species("Fe1")[1])
    assert species("NO3")[0] == 0  # nitrate, not nobelium
    assert species("Ow1", False)[0] == 8


def test_every_truncation_gives_structure_error_or_crystal():
    text = cif_text("Fe1 Fe 0.1 0.2 0.3 0.5\nO1 O 0 0 0 1",
                    symmetry=_ops_loop("_symmetry_equiv_pos_as_xyz", P21C_OPS) +
                    "_publ_section_title\n;\nA title\n;\n",
                    columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy"))
    for i in range(len(text) + 1):
        try:
            crystals = read_cif_bytes(text[:i].encode(), "cut.cif")
        except StructureError as exc:
            assert "\n" not in str(exc)
        else:
            for c in crystals:
                assert_valid(c)


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=400))
def test_random_bytes(data):
    try:
        crystals = read_cif_bytes(data, "fuzz.cif")
    except StructureError:
        return
    for c in crystals:
        assert_valid(c)


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 10_000), st.sampled_from("0123456789.-+()?'\"; _\nxyzabcXYZ,/\x00\xe9"))
def test_mutated_cif(pos, char):
    text = cif_text("Fe1 Fe 0.1 0.2 0.3 0.5\nO1 O 0 0 0 1",
                    symmetry=_ops_loop("_symmetry_equiv_pos_as_xyz", P21C_OPS),
                    columns=("label", "type_symbol", "fract_x", "fract_y", "fract_z", "occupancy"))
    pos %= len(text)
    mutated = (text[:pos] + char + text[pos + 1:]).encode("utf-8")
    try:
        crystals = read_cif_bytes(mutated, "mutated.cif")
    except StructureError:
        return
    for c in crystals:
        assert_valid(c)


# ---------------------------------------------------------------------------
# directories
# ---------------------------------------------------------------------------

def test_iter_structure_files(tmp_path):
    names = ["b.cif", "a.mcif", "sub/POSCAR", "sub/CONTCAR_2", "sub/x.vasp", "sub/y.poscar",
             "sub/deeper/z.xyz", "w.extxyz", "s.json", "g.cif.gz", "README.md", "notes.txt",
             ".hidden.cif", ".git/x.cif", "sub/README", "README.json", "A.CIF"]
    for name in names:
        p = tmp_path / name
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text("")
    found = [p.relative_to(tmp_path).as_posix() for p in iter_structure_files(tmp_path)]
    assert found == ["A.CIF", "a.mcif", "b.cif", "g.cif.gz", "s.json", "sub/CONTCAR_2",
                     "sub/POSCAR", "sub/deeper/z.xyz", "sub/x.vasp", "sub/y.poscar", "w.extxyz"]
    assert list(iter_structure_files(tmp_path / "notes.txt")) == [tmp_path / "notes.txt"]
    with pytest.raises(StructureError, match="no such file"):
        list(iter_structure_files(tmp_path / "missing"))


def test_iter_bad_directory_reads_only_structure_errors():
    paths = list(iter_structure_files(BAD))
    assert len(paths) == len(BAD_REASONS)
    for p in paths:
        if BAD_REASONS[p.name].get("stage", "read") == "read":
            with pytest.raises(StructureError):
                read(p)
        else:
            assert read(p)


# ---------------------------------------------------------------------------
# import cost
# ---------------------------------------------------------------------------

def test_import_does_not_load_ase_or_pymatgen():
    code = ("import sys, bondcheck.read; "
            "print(sorted({m.split('.')[0] for m in sys.modules} & {'ase', 'pymatgen', 'spglib'}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=HERE.parent, check=True).stdout.strip()
    assert out == "[]"


# ---------------------------------------------------------------------------
# the shared corpus (absent in a fresh clone: skipped)
# ---------------------------------------------------------------------------

def _formula_sum(path: Path) -> str:
    m = re.search(r"^_chemical_formula_sum\s+(.+)$", path.read_text(errors="replace"), re.M)
    return m.group(1) if m else ""


def _multiplicities(path: Path) -> dict[str, int]:
    import gemmi
    block = gemmi.cif.read(str(path)).sole_block()
    table = block.find("_atom_site_", ["label", "symmetry_multiplicity"])
    return {row.str(0): int(row.str(1)) for row in table}


@pytest.mark.skipif(not CORPUS.is_dir(), reason="shared corpus not present")
@pytest.mark.parametrize("subset", ["mp-relaxed", "prototypes"])
def test_corpus(subset):
    from ase.data import chemical_symbols
    files = sorted((CORPUS / subset).glob("*.cif"))[:300]
    if not files:
        pytest.skip(f"no CIF files in corpus/{subset}")
    read_ok, rejected = {}, {}
    for f in files:
        try:
            crystals = read(f)
        except StructureError as exc:
            rejected[f] = str(exc)
            continue
        assert len(crystals) == 1
        assert_valid(crystals[0])
        read_ok[f] = crystals[0]
    # The only files turned away name a group of atoms or a placeholder as
    # the type of a site ('H2O', 'OH', 'NH4', 'M'), which is also what their
    # formula says; pymatgen reads these as H, O, nihonium or a dummy atom.
    for f, msg in rejected.items():
        m = re.fullmatch(r"unknown element symbol '([^']+)' \(site '[^']*'\)", msg)
        assert m, f"{f.name}: {msg}"
        assert m.group(1) not in chemical_symbols, f.name
        assert m.group(1) in _formula_sum(f), f.name
    assert len(read_ok) >= 0.9 * len(files)

    for f in random.Random(30).sample(sorted(read_ok), 30):
        c = read_ok[f]
        s = pymatgen_cif(f)
        assert c.volume == pytest.approx(s.volume, rel=1e-9), f.name
        if composition(c) != pymatgen_composition(s):
            # pymatgen keeps images of a site 1e-4 (fractional) apart as two
            # atoms, which splits atoms on special positions whose coordinates
            # are rounded; the file's own Wyckoff multiplicities decide
            mult = _multiplicities(f)
            assert mult, f"{f.name}: differs from pymatgen and gives no multiplicities"
            assert dict(Counter(c.labels.tolist())) == mult, f.name
