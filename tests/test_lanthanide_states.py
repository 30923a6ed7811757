"""Ce, Pr and Tb at +3 and +4.

Structures from published crystal data (cell and positions from memory):
CeO2 fluorite, Fm-3m, a = 5.411 A; Ce2O3 A-type (La2O3 type), P-3m1,
a = 3.891 A, c = 6.059 A, Ce 2d z = 0.2454, O 1a and 2d z = 0.6471; CeS
rock salt, a = 5.778 A. Oxidation states are well-known structural chemistry
(common practice, no source): Ce4+ in CeO2 and in Na2PrO3's Pr4+ analogue,
Ce3+ in Ce2O3, CeS a metal with Ce3+ and one electron per formula in the
conduction band.
"""
import json
from importlib import resources
from pathlib import Path

import pytest
from ase.spacegroup import crystal

from bondcheck import elements
from bondcheck.api import check

CORPUS = Path(__file__).resolve().parents[2] / "shared" / "corpus"


def _ceo2():
    return crystal(["Ce", "O"], [(0, 0, 0), (0.25, 0.25, 0.25)], spacegroup=225, cellpar=[5.411] * 3 + [90] * 3)


def _ce2o3():
    return crystal(["Ce", "O", "O"], [(1 / 3, 2 / 3, 0.2454), (0, 0, 0), (1 / 3, 2 / 3, 0.6471)], spacegroup=164,
                   cellpar=[3.891, 3.891, 6.059, 90, 90, 120])


def _ces():
    return crystal(["Ce", "S"], [(0, 0, 0), (0.5, 0.5, 0.5)], spacegroup=225, cellpar=[5.778] * 3 + [90] * 3)


def _charges(r, el):
    return {s["formal_charge"] for s in r.sites if s["element"] == el}


def test_ceo2_is_ce4_plus():
    r = check(_ceo2())
    assert r.verdict == "consistent", r.causes
    assert r.vec_anion == pytest.approx(8.0)  # (4 + 2 * 6) / 2
    assert r.residual == pytest.approx(0.0)
    assert _charges(r, "Ce") == {4.0}
    assert "tetravalent-lanthanide" in r.causes


def test_ce2o3_is_ce3_plus():
    r = check(_ce2o3())
    assert r.verdict == "consistent", r.causes
    # Counted with four electrons beside oxide: (2 * 4 + 3 * 6) / 3, and one
    # kept per Ce (2 per 3 anions).
    assert r.vec_anion == pytest.approx(26 / 3, abs=1e-3)
    assert r.residual == pytest.approx(2 / 3, abs=1e-3)
    assert _charges(r, "Ce") == {3.0}
    assert "tetravalent-lanthanide" not in r.causes


def test_ces_stays_a_metal_with_ce3_plus():
    # Beside S, Ce counts three electrons: one left over per anion, as before.
    r = check(_ces())
    assert r.verdict == "mismatch"
    assert r.vec_anion == pytest.approx(9.0)
    assert r.residual == pytest.approx(1.0)
    assert _charges(r, "Ce") == {3.0}
    assert "tetravalent-lanthanide" not in r.causes


def test_user_valence_overrides_the_fourth_electron():
    r = check(_ceo2(), valence={"Ce": 3})
    assert r.verdict == "mismatch"
    assert r.residual == pytest.approx(-0.5)


def test_the_set_is_the_lanthanides_with_icsd_state_4():
    table = json.loads(resources.files("bondcheck").joinpath("data/elements.json").read_text())
    lanthanides = [s for s, row in table.items() if 57 <= row["Z"] <= 71]
    assert {s for s in lanthanides if 4 in table[s]["icsd_ox"]} == elements.TETRAVALENT_LANTHANIDES


@pytest.mark.skipif(not (CORPUS / "prototypes").is_dir(), reason="../shared/corpus absent")
def test_na2pro3_prototype_is_pr4_plus():
    # Literature prototype A2B3C_mC48_15_aef_3f_2e (Na2PrO3) of the shared corpus.
    r = check(str(CORPUS / "prototypes" / "A2B3C_mC48_15_aef_3f_2e.cif"))
    assert r.verdict == "consistent", r.causes
    assert _charges(r, "Pr") == {4.0}
    assert "missing-hydrogen" not in r.causes
