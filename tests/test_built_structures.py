"""Structures built in the test from published or well-known crystal data."""
import numpy as np
import pytest
from ase.spacegroup import crystal as ase_crystal

from bondcheck.api import check
from bondcheck.record import Crystal

from .conftest import site


def test_natl_diamond_net():
    # NaTl (B32), Fd-3m, a = 7.473 A, Na 8a, Tl 8b (Zintl & Dullenkopf 1932; from memory).
    # Tl- is isoelectronic with group 14: a diamond net, AA = 4 per Tl (common practice).
    atoms = ase_crystal(["Na", "Tl"], [(0, 0, 0), (0.5, 0.5, 0.5)], spacegroup=227, cellpar=[7.473] * 3 + [90] * 3)
    r = check(atoms)
    assert r.verdict == "consistent"
    assert r.anions == ["Tl"] and r.cations == ["Na"]
    assert r.vec_anion == pytest.approx(4.0)
    assert r.aa_predicted == pytest.approx(4.0)
    assert r.aa_observed == pytest.approx(4.0)
    tl = site(r, element="Tl")
    assert tl["wyckoff"] in ("a", "b") and tl["multiplicity"] == 8
    # Tl-Tl at a*sqrt(3)/4 = 3.24 A, ratio 3.24 / (2 * 1.45) = 1.12: a bond.
    assert tl["last_bonded"] == pytest.approx(1.116, abs=0.005)
    # Na-Na at the same distance never counts (electropositive pair).
    assert site(r, element="Na")["bonds"] == 0


def test_pyrite_s2_pairs():
    # Pyrite FeS2, Pa-3, a = 5.417 A, S at 8c x = 0.385 (Bayliss, Am. Mineral. 62, 1168 (1977); from memory).
    atoms = ase_crystal(["Fe", "S"], [(0, 0, 0), (0.385, 0.385, 0.385)], spacegroup=205, cellpar=[5.417] * 3 + [90] * 3)
    r = check(atoms)
    assert r.verdict == "consistent"
    assert r.anions == ["S"]
    assert r.vec_anion == pytest.approx(10.0)  # (8 + 2 * 6) / 2
    assert r.aa_observed == pytest.approx(1.0)  # S2 2- dumbbells, S-S = 2.16 A
    assert r.residual == pytest.approx(3.0)  # 6 electrons per Fe stay as d6
    assert site(r, element="S")["formal_charge"] == pytest.approx(-1)
    assert site(r, element="Fe")["formal_charge"] == pytest.approx(2)  # low-spin Fe2+ d6
    assert "d-electrons" in r.causes


def _clathrate(ga_fraction: float) -> Crystal:
    # Type-I clathrate Ba8Ga16Ge30, Pm-3n, a = 10.78 A; Ba 2a and 6d, framework 6c,
    # 16i (x = 0.1835), 24k (0, 0.3085, 0.1172) (Eisenmann et al., J. Less-Common Met.
    # 118, 43 (1986); values from memory). Ga and Ge share the framework sites at random.
    a = 10.78
    ba = ase_crystal(["Ba", "Ba"], [(0, 0, 0), (0.25, 0.5, 0)], spacegroup=223, cellpar=[a] * 3 + [90] * 3)
    fw = ase_crystal(["Ge"] * 3, [(0.25, 0, 0.5), (0.1835, 0.1835, 0.1835), (0, 0.3085, 0.1172)], spacegroup=223, cellpar=[a] * 3 + [90] * 3)
    nfw = len(fw)
    assert len(ba) == 8 and nfw == 46
    frac = np.vstack([ba.get_scaled_positions(), fw.get_scaled_positions(), fw.get_scaled_positions()])
    numbers = np.array([56] * 8 + [31] * nfw + [32] * nfw)
    occ = np.array([1.0] * 8 + [ga_fraction] * nfw + [1 - ga_fraction] * nfw)
    n = len(numbers)
    return Crystal(cell=np.array(ba.cell[:]), frac=frac, numbers=numbers, occupancy=occ,
                   labels=np.array(["Ba1"] * 2 + ["Ba2"] * 6 + ["M"] * (2 * nfw)), charges=np.full(n, np.nan),
                   name="Ba8Ga16Ge30", source="built")


def test_clathrate_mixed_ga_ge_framework():
    # Zintl count: 8 Ba give 16 electrons, which turn 16 Ga into Ga- (isoelectronic with Ge):
    # VEC = (16 + 48 + 120) / 46 = 4, a four-bonded framework (common practice, no source).
    r = check(_clathrate(16 / 46))
    assert r.verdict == "consistent"
    assert set(r.anions) == {"Ga", "Ge"}
    assert r.vec_anion == pytest.approx(4.0, abs=1e-3)
    assert r.aa_observed == pytest.approx(4.0, abs=1e-3)
    assert r.residual == pytest.approx(0.0, abs=1e-3)
    assert "partial-occupancy" in [f.slug for f in r.findings]


def test_clathrate_with_wrong_ga_content_is_a_mismatch():
    # Ba8Ga8Ge38 would leave 8 electrons per cell with nowhere to go.
    r = check(_clathrate(8 / 46))
    assert r.verdict == "mismatch"
    assert r.residual == pytest.approx(8 / 46, abs=1e-3)
