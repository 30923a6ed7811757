"""Diagnosis of counts that do not close, and the anion substructure.

Structures are built from published crystal data (source beside each) or
taken from ase's and pymatgen's bundled files.
"""
import numpy as np
import pytest
from ase.spacegroup import crystal as ase_crystal

from bondcheck.api import check

from .conftest import site


def slugs(r):
    return [f.slug for f in r.findings]


def finding(r, slug):
    for f in r.findings:
        if f.slug == slug:
            return f
    raise AssertionError(f"{slug} not in {slugs(r)}")


def cell(a, c=None, b=None, gamma=90):
    return [a, b or a, c or a, 90, 90, gamma]


# -- structures -----------------------------------------------------------

def cac2():
    # CaC2-I, I4/mmm, a = 3.89, c = 6.38 A, C at 4e z = 0.406 (Atoji, J. Chem. Phys. 35, 1950 (1961); from memory).
    return ase_crystal(["Ca", "C"], [(0, 0, 0), (0, 0, 0.406)], spacegroup=139, cellpar=cell(3.89, 6.38))


def cab6():
    # CaB6, Pm-3m, a = 4.145 A, B at 6f x = 0.207 (common CsCl-derived boride type; from memory).
    return ase_crystal(["Ca", "B"], [(0, 0, 0), (0.207, 0.5, 0.5)], spacegroup=221, cellpar=cell(4.145))


def bi2te3():
    # Bi2Te3, R-3m, a = 4.36914, c = 30.42293 A, Bi 6c z = 0.399, Te1 3a, Te2 6c z = 0.208
    # (P. W. Lange, Naturwissenschaften 27, 133 (1939), as given by the AFLOW prototype library, A2B3_hR5_166_c_ac).
    return ase_crystal(["Bi", "Te", "Te"], [(0, 0, 0.399), (0, 0, 0), (0, 0, 0.208)], spacegroup=166,
                       cellpar=cell(4.36914, 30.42293, gamma=120))


def calomel():
    # Hg2Cl2, I4/mmm, a = 4.4795, c = 10.9054 A, Hg 4e z = 0.1161, Cl 4e z = 0.3355 (from memory).
    return ase_crystal(["Hg", "Cl"], [(0, 0, 0.1161), (0, 0, 0.3355)], spacegroup=139, cellpar=cell(4.4795, 10.9054))


def skutterudite():
    # CoAs3, Im-3, a = 8.2043 A, Co 8c, As 24g (0, 0.3431, 0.1512) (Mandel & Donohue, Acta Cryst. B27, 2288 (1971); from memory).
    return ase_crystal(["Co", "As"], [(0.25, 0.25, 0.25), (0, 0.3431, 0.1512)], spacegroup=204, cellpar=cell(8.2043))


def beta_tin():
    # white Sn, I4_1/amd, a = 5.8197, c = 3.1749 A, Sn 4a (origin choice 2) (from memory).
    return ase_crystal(["Sn"], [(0, 0.75, 0.125)], spacegroup=141, setting=2, cellpar=cell(5.8197, 3.1749))


def natl(anion="Tl"):
    # NaTl (B32), Fd-3m, a = 7.473 A (from memory).
    return ase_crystal(["Na", anion], [(0, 0, 0), (0.5, 0.5, 0.5)], spacegroup=227, cellpar=cell(7.473))


def mg2si(anion="Si"):
    # Mg2Si antifluorite, Fm-3m, a = 6.351 A (common practice, value from memory).
    return ase_crystal([anion, "Mg"], [(0, 0, 0), (0.25, 0.25, 0.25)], spacegroup=225, cellpar=cell(6.351))


def triiodide_model():
    # Not a real compound: a model cell holding one linear, symmetric I3- ion (I-I 2.92 A, the
    # well-known geometry of I3-; common practice, no source) and one Cs+, ions 4-5 A apart.
    from ase import Atoms

    return Atoms("CsI3", positions=[(3.5, 3.5, 0.0), (0, 0, 6.0 - 2.92), (0, 0, 6.0), (0, 0, 6.0 + 2.92)],
                 cell=[7.0, 7.0, 12.0], pbc=True)


# -- multiple bonds, clusters, hypervalence ---------------------------------

def test_cac2_triple_bond():
    r = check(cac2())
    assert r.verdict == "consistent"
    assert r.vec_anion == pytest.approx(5.0) and r.aa_observed == pytest.approx(1.0)
    assert r.residual == pytest.approx(-2.0)  # two pi bonds per C: C2 2- is isoelectronic with N2
    assert "multiple-bonds" in r.causes
    assert "dimer C2 (0D)" in r.polyanion


def test_cab6_closo_octahedra():
    # Wade: closo B6 needs 7 pairs; 6 B x 2 electrons + 2 from Ca = 14 electrons.
    r = check(cab6())
    assert r.verdict == "consistent"
    f = finding(r, "electron-deficient-cluster")
    assert f.evidence["vertices"] == 6 and f.evidence["edges"] == 12 and f.evidence["kind"] == "closo"
    assert f.evidence["skeletal_electrons"] == pytest.approx(14.0)
    assert r.causes[0] == "electron-deficient-cluster"


def test_cab6_with_wrong_cation_count_does_not_close():
    # K in place of Ca: 13 skeletal electrons, no Wade count closes.
    atoms = cab6()
    atoms.numbers[atoms.numbers == 20] = 19
    r = check(atoms)
    assert r.verdict == "mismatch"
    f = finding(r, "electron-deficient-cluster")
    assert f.evidence["kind"] == "none" and f.level == "warning"


def test_triiodide_hypervalent():
    r = check(triiodide_model())
    assert r.verdict == "mismatch"
    assert r.causes[0] == "hypervalent"
    f = finding(r, "hypervalent")
    assert f.evidence["shape"] == "linear"
    # Pauling orders of two 2.92 A bonds from d(1) = 2.78 A: 10**(-0.14/0.6) = 0.58 each.
    assert f.evidence["bond_orders"] == pytest.approx([0.584, 0.584], abs=0.01)
    assert "trimer I3 (0D)" in r.polyanion


def test_bi2te3_lone_pairs_inert():
    r = check(bi2te3())
    assert r.verdict == "consistent"
    assert r.causes == ["lone-pairs"]
    assert r.residual == pytest.approx(4 / 3, abs=1e-3)  # one pair on each of 2 Bi over 3 Te
    act = finding(r, "lone-pair-activity")
    assert act.evidence["offset_A"] < 0.25  # Bi sits near the centre of its Te6 octahedron


def test_calomel_hg_hg_bond():
    r = check(calomel())
    assert r.verdict == "consistent"
    assert "cation-cation-bonds" in r.causes
    assert site(r, element="Hg")["bonds"] == 1
    assert site(r, element="Hg")["formal_charge"] == pytest.approx(1)  # Hg2 2+


def test_skutterudite_as4_rings_co_d6():
    r = check(skutterudite())
    assert r.verdict == "consistent"
    assert r.aa_observed == pytest.approx(2.0)  # each As in a square As4 ring
    assert site(r, element="Co")["formal_charge"] == pytest.approx(3)
    assert "4-membered ring As4 (0D)" in r.polyanion
    assert "d-electrons" in r.causes


def test_white_tin_metallic():
    r = check(beta_tin())
    assert r.verdict == "mismatch"
    assert r.aa_observed == pytest.approx(6.0)  # 4 + 2 neighbours at 3.02 and 3.17 A
    assert r.causes[0] == "metallic"


# -- what a curator needs: misassigned and missing atoms -------------------

def test_natl_with_tl_typed_as_pb():
    r = check(natl("Pb"))
    assert r.verdict == "mismatch"
    assert r.causes[0] == "possibly-misassigned-element"
    f = finding(r, "possibly-misassigned-element")
    assert f.evidence["from"] == "Pb" and f.evidence["to"] == "Tl"
    assert f.evidence["atoms_per_cell"] == 8


def test_mg2si_with_si_typed_as_al():
    r = check(mg2si("Al"))
    assert r.verdict == "mismatch"
    f = finding(r, "possibly-misassigned-element")
    assert (f.evidence["from"], f.evidence["to"]) == ("Al", "Si")
    # The Mg site as Na or Al does not close the count, so only the anion site is named.
    assert all(g.evidence["from"] == "Al" for g in r.findings if g.slug == "possibly-misassigned-element")


def portlandite(with_h=True):
    # Ca(OH)2, P-3m1, a = 3.589, c = 4.911 A, O 2d z = 0.2341, H 2d z = 0.4248 (Desgranges et al.,
    # Acta Cryst. B49, 812 (1993); from memory).
    els, pos = ["Ca", "O"], [(0, 0, 0), (1 / 3, 2 / 3, 0.2341)]
    if with_h:
        els.append("H")
        pos.append((1 / 3, 2 / 3, 0.4248))
    return ase_crystal(els, pos, spacegroup=164, cellpar=cell(3.589, 4.911, gamma=120))


def test_hydroxide_without_hydrogen():
    assert check(portlandite()).verdict == "consistent"
    r = check(portlandite(with_h=False))
    assert r.verdict == "mismatch"
    assert r.causes[0] == "missing-hydrogen"
    assert finding(r, "missing-hydrogen").args["n"] == "2"  # two OH per Ca(OH)2


def test_hydrate_without_hydrogen_from_corpus(corpus, tmp_path):
    # A real hydrate from the reference corpus (AFLOW prototype library, MgCl2.6H2O,
    # bischofite, with H positions), H sites deleted.
    from bondcheck.read import read

    src = corpus / "prototypes" / "A2B12CD6_mC42_12_i_2i2j_a_ij.cif"
    if not src.exists():
        pytest.skip("MgCl2.6H2O prototype not in this corpus")
    full = check(src)
    cr = read(src)[0]
    keep = cr.numbers != 1
    assert (~keep).sum() > 0
    from dataclasses import replace

    no_h = replace(cr, frac=cr.frac[keep], numbers=cr.numbers[keep], occupancy=cr.occupancy[keep],
                   labels=cr.labels[keep], charges=cr.charges[keep])
    r = check(no_h)
    assert full.verdict == "consistent"
    assert r.verdict == "mismatch" and r.causes[0] == "missing-hydrogen", r.causes
    assert finding(r, "missing-hydrogen").args["n"] == "12"  # six waters per formula unit


def test_vo2_typed_as_nitride_implausible_vanadium(pmg_structures):
    # pymatgen's bundled VO2 with O typed as N: V would have to be V6+, above its group number.
    from pymatgen.core import Structure

    s = Structure.from_file(pmg_structures / "VO2.json")
    s.replace_species({"O": "N"})
    r = check(s)
    assert r.verdict == "mismatch"
    f = finding(r, "implausible-oxidation-state")
    assert f.evidence["implied_oxidation_state"] == pytest.approx(6.0)


# -- polyanion description ---------------------------------------------------

def test_polyanion_motifs_dimensionality():
    from ase.collections import dcdft

    assert "framework" in check(natl()).polyanion and "(3D)" in check(natl()).polyanion
    g = check(dcdft["C"])
    assert "three-connected layer C" in g.polyanion and "(2D)" in g.polyanion  # graphite sheets
    se = check(dcdft["Se"])
    assert "chain Se" in se.polyanion and "(1D)" in se.polyanion  # trigonal Se helices
    i2 = check(dcdft["I"])
    assert "dimer I2 (0D)" in i2.polyanion


def test_consistent_structures_stay_quiet(minerals):
    # Probes for mismatches must not fire on a closed count (ase's bundled COD 1010995, moissanite).
    r = check(minerals / "cod_1010995.cif")
    assert r.verdict == "consistent"
    assert not any(f.level in ("warning", "error") for f in r.findings)


def test_findings_documented():
    import importlib.util

    from .conftest import ROOT

    spec = importlib.util.spec_from_file_location("make_findings_doc", ROOT / "tools" / "make_findings_doc.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert (ROOT / "docs" / "findings.md").read_text() == mod.render(), "run python tools/make_findings_doc.py"


def test_ambiguous_cutoff_gives_range(minerals):
    # Breithauptite NiSb (ase's bundled COD 1010930): the Sb-Sb contact at ratio 1.23 sits
    # within 3 % of the extended criterion, so the finding gives the range the verdict holds over.
    r = check(minerals / "cod_1010930.cif")
    f = finding(r, "ambiguous-cutoff")
    lo, hi = f.evidence["verdict_holds_for_scale"]
    assert lo <= 1.0 <= hi and lo < hi
    assert "Sb1" in f.sites


def test_explain_every_finding():
    import subprocess
    import sys

    from bondcheck.findings import all_findings

    for slug in ("hypervalent", "possibly-misassigned-element", "electron-deficient-cluster", "missing-hydrogen"):
        assert slug in all_findings()
    p = subprocess.run([sys.executable, "-m", "bondcheck.cli", "explain", "possibly-misassigned-element"],
                       capture_output=True, text=True, timeout=60)
    assert p.returncode == 0 and "same period" in p.stdout


def test_file_repairs_are_reported(minerals, tmp_path):
    # Moissanite (ase's bundled COD 1010995) behind a banner line without '#': read, mended, and said so.
    p = tmp_path / "banner.cif"
    p.write_text("Copyright line from a database export\n" + (minerals / "cod_1010995.cif").read_text())
    r = check(p)
    assert r.verdict == "consistent" and r.causes == []
    f = finding(r, "file-repaired")
    assert f.level == "info" and f.evidence == {"preamble_lines": 1}
    assert "file-repaired" not in slugs(check(minerals / "cod_1010995.cif"))
