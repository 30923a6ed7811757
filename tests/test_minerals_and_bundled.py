"""Compounds shipped with ase and pymatgen.

ase's bundled COD mineral CIFs (ase/test/testdata/minerals) and pymatgen's
bundled structures (pymatgen/util/structures). Expected chemistry is
well-known structural chemistry (common practice, no source) unless a source
is named.
"""
import pytest

from bondcheck.api import check

from .conftest import site


def test_cobaltite_as_s_pairs(minerals):
    # COD 9004218 cobaltite CoAsS: [AsS]3- pairs, Co3+ low-spin d6.
    r = check(minerals / "cod_9004218.cif")
    assert r.verdict == "consistent"
    assert set(r.anions) == {"As", "S"} and r.cations == ["Co"]
    assert r.vec_anion == pytest.approx(10.0)  # (9 + 5 + 6) / 2
    assert r.aa_observed == pytest.approx(1.0)
    assert r.residual == pytest.approx(3.0)  # 6 electrons per formula kept as Co d6
    assert site(r, element="As")["formal_charge"] == pytest.approx(-2)
    assert site(r, element="S")["formal_charge"] == pytest.approx(-1)
    assert site(r, element="Co")["formal_charge"] == pytest.approx(3)
    assert "d-electrons" in r.causes


def test_molybdenite_mo_d2(minerals):
    # COD 9007661 molybdenite MoS2: S2- only, Mo4+ d2, no S-S or Mo-Mo bonds.
    r = check(minerals / "cod_9007661.cif")
    assert r.verdict == "consistent"
    assert r.anions == ["S"]
    assert r.aa_observed == 0 and r.cc_observed == 0
    assert r.residual == pytest.approx(1.0)  # 2 d electrons over 2 S
    assert site(r, element="Mo")["formal_charge"] == pytest.approx(4)
    assert "d-electrons" in r.causes


def test_moissanite_aa_zero(minerals):
    # COD 1010995 moissanite 3C SiC: C4- with no C-C bonds, VEC 8.
    r = check(minerals / "cod_1010995.cif")
    assert r.verdict == "consistent"
    assert r.anions == ["C"]
    assert r.vec_anion == pytest.approx(8.0)
    assert r.aa_observed == 0 and r.residual == 0
    assert site(r, element="Si")["coordination"] == pytest.approx(4)


def test_cristobalite(minerals):
    # COD 9017338 cristobalite SiO2: SiO4 tetrahedra, O two-coordinate.
    r = check(minerals / "cod_9017338.cif")
    assert r.verdict == "consistent" and r.causes == []
    assert r.vec_anion == pytest.approx(8.0)
    assert site(r, element="O")["coordination"] == pytest.approx(2)
    assert site(r, element="Si")["coordination"] == pytest.approx(4)


def test_heazlewoodite_ni_ni_bonds(minerals):
    # COD 9007640 heazlewoodite Ni3S2: metal-rich, short Ni-Ni contacts (about 2.5 A).
    r = check(minerals / "cod_9007640.cif")
    assert r.anions == ["S"]
    assert r.cc_observed > 0
    assert "cation-cation-bonds" in r.causes
    assert r.verdict == "consistent"
    ni = site(r, element="Ni")
    assert 0 < ni["formal_charge"] < 2  # average Ni(4/3+), common practice, no source


def test_breithauptite(minerals):
    # COD 1010930 breithauptite NiSb (NiAs type): Sb has only Ni neighbours,
    # Ni-Ni along c (c/2 = 2.57 A); the Sb-Sb contact (3.4 A) is no bond.
    r = check(minerals / "cod_1010930.cif")
    assert r.anions == ["Sb"]
    sb = site(r, element="Sb")
    assert sb["bonds"] == 0 and sb["coordination"] == 6
    assert site(r, element="Ni")["bonds"] == 2


@pytest.mark.parametrize("name", ["K2O2.json", "Li2O2.json"])
def test_peroxides_one_o_o_bond(pmg_structures, name):
    r = check(pmg_structures / name)
    assert r.verdict == "consistent"
    assert r.anions == ["O"]
    assert r.vec_anion == pytest.approx(7.0)
    assert r.aa_observed == pytest.approx(1.0)
    assert site(r, element="O")["formal_charge"] == pytest.approx(-1)


def test_bundled_graphite_and_silicon(pmg_structures):
    g = check(pmg_structures / "Graphite.json")
    assert g.verdict == "consistent" and g.aa_observed == 3 and "pi-bonds" in g.causes
    si = check(pmg_structures / "Si.json")
    assert si.verdict == "consistent" and si.aa_observed == 4


def test_tlbise2_lone_pairs(pmg_structures):
    # TlBiSe2: Tl+ and Bi3+ each keep an ns2 pair; Se2- isolated.
    r = check(pmg_structures / "TlBiSe2.json")
    assert r.verdict == "consistent"
    assert r.residual == pytest.approx(2.0)  # 4 electrons per formula over 2 Se
    assert "lone-pairs" in r.causes
    assert site(r, element="Tl")["formal_charge"] == pytest.approx(1)
    assert site(r, element="Bi")["formal_charge"] == pytest.approx(3)


def test_lifepo4_fe2(pmg_structures):
    r = check(pmg_structures / "LiFePO4.json")
    assert r.verdict == "consistent"
    assert r.anions == ["O"]
    assert site(r, element="Fe")["formal_charge"] == pytest.approx(2)
    assert site(r, element="P")["formal_charge"] == pytest.approx(5)


def test_srtio3(pmg_structures):
    r = check(pmg_structures / "SrTiO3.json")
    assert r.verdict == "consistent" and r.residual == 0
    assert site(r, element="Ti")["formal_charge"] == pytest.approx(4)


def test_lgps_partial_occupancy(pmg_structures):
    # Li10GeP2S12 (pymatgen's bundled model with partial Li and mixed Ge/P sites):
    # isolated PS4 and GeS4 tetrahedra, VEC_S = 8 on average.
    r = check(pmg_structures / "Li10GeP2S12.json")
    assert r.verdict == "consistent"
    assert r.anions == ["S"]
    assert r.vec_anion == pytest.approx(8.0, abs=0.02)
    assert "partial-occupancy" in [f.slug for f in r.findings]
    assert any(s["occupancy"] < 1 for s in r.sites)


def test_checked_together_as_one_at_a_time(minerals, pmg_structures):
    """check_crystals (stage by stage over a list, as scan workers run) gives
    every result check_crystal gives, on ase's bundled COD minerals and
    pymatgen's bundled structures; a record that cannot be checked (a cell
    with no atoms, made here) gets its error without disturbing the others."""
    from dataclasses import replace

    from bondcheck.api import Options, check_crystal, check_crystals
    from bondcheck.read import read

    crystals = [c for f in sorted(minerals.glob("*.cif")) for c in read(f)]
    crystals += [c for f in sorted(pmg_structures.glob("*.json"))[:12] for c in read(f)]
    empty = replace(crystals[0], frac=crystals[0].frac[:0], numbers=crystals[0].numbers[:0],
                    occupancy=crystals[0].occupancy[:0], labels=crystals[0].labels[:0],
                    charges=crystals[0].charges[:0], name="empty")
    crystals.insert(3, empty)
    assert len(crystals) > 20
    for opts in (Options(), Options(symmetry=False)):
        together = check_crystals(crystals, opts)
        assert len(together) == len(crystals)
        for c, r in zip(crystals, together):
            a, b = check_crystal(c, opts).to_dict(), r.to_dict()
            a.pop("seconds"), b.pop("seconds")
            assert a == b, c.name
        assert together[3].status == "error" and together[3].error == "no atoms in the structure"
        assert sum(r.status == "ok" for r in together) == len(crystals) - 1


def test_direct_neighbour_search_equals_vesin_wrapper(minerals, pmg_structures):
    """The neighbour search through vesin's C entry point returns the pairs,
    shifts and distances of vesin's own Python wrapper, in the same order, on
    ase's bundled COD minerals and pymatgen's bundled structures (the direct
    call is used only for the vesin versions it was checked with)."""
    import numpy as np

    from bondcheck import bonds
    from bondcheck.read import read

    direct = bonds._direct_search()
    if direct is None:
        pytest.skip("installed vesin is not a version the direct call was checked with")
    wrapped = bonds._WrappedSearch()
    crystals = [c for f in sorted(minerals.glob("*.cif")) for c in read(f)]
    crystals += [c for f in sorted(pmg_structures.glob("*.json")) for c in read(f)]
    assert len(crystals) > 20
    seen = 0
    for c in crystals:
        cell = np.ascontiguousarray(c.cell, dtype=np.float64)
        pts = np.ascontiguousarray(c.frac @ cell, dtype=np.float64)
        for cutoff in (3.0, 5.5):
            a = [np.array(x) for x in wrapped(pts, cell, cutoff)]
            b = [np.array(x) for x in direct(pts, cell, cutoff)]  # copies: views die at the next search
            for x, y in zip(a, b):
                assert x.dtype == y.dtype and np.array_equal(x, y), c.name
            seen += len(a[0])
    assert seen > 1000


def test_kept_electrons_do_not_depend_on_what_was_counted_before(minerals):
    """The electrons a cation keeps come back as floats, the same numbers
    whether or not other structures were counted first (the count's caches
    are keyed by option sets that compare equal across int and float, so
    mixed types let the first structure decide what later ones get).
    Cobaltite CoAsS (COD 9004218) keeps Co d6 and molybdenite MoS2
    (COD 9007661) Mo d2 (common practice, no source)."""
    from bondcheck.api import Options
    from bondcheck.bonds import find_contacts
    from bondcheck.count import count
    from bondcheck.read import read
    from bondcheck.symmetry import group_sites

    def keeps(name):
        c = read(minerals / name)[0]
        contacts = find_contacts(c, Options().criterion)
        k = count(c, contacts, group_sites(c, contacts)).closure.keep
        return sorted((g, type(v).__name__, v) for g, v in k.items())

    alone = {n: keeps(n) for n in ("cod_9004218.cif", "cod_9007661.cif")}
    assert all(t == "float" for n in alone for _, t, _ in alone[n])
    assert any(v == 6 for _, _, v in alone["cod_9004218.cif"])
    assert any(v == 2 for _, _, v in alone["cod_9007661.cif"])
    for _ in range(2):  # after every mineral bundled with ase, in turn
        for f in sorted(minerals.glob("*.cif")):
            keeps(f.name)
            for n, expected in alone.items():
                assert keeps(n) == expected, (f.name, n)
