"""Broad checks on the reference corpus at ../shared/corpus (skipped when absent).

mp-relaxed: Materials Project PBE-relaxed cells (3DSC data set, Sommer et al.,
Sci. Data 10, 816 (2023)); prototypes: AFLOW Encyclopedia of Crystallographic
Prototypes. Expected chemistry is well-known Zintl-phase structural chemistry
(common practice, no source).
"""
import pytest

from bondcheck.api import check, check_all


@pytest.mark.parametrize(
    "mp_id,formula,motif,dim",
    [
        ("mp-1477", "BaSi2", "tetrahedron Si4", "0D"),  # Si4 4- tetrahedra, P4-like
        ("mp-1536", "KSb", "chain Sb", "1D"),  # Sb- helices, Se-like
        ("mp-1563", "CaSi", "chain Si", "1D"),  # zigzag Si2- chains (CrB type)
        ("mp-2699", "CaSi2", "three-connected layer Si", "2D"),  # puckered Si- layers, As-like
        ("mp-1727", "SrSi2", "framework Si", "3D"),  # three-connected 3D Si- net
        ("mp-1307", "LiGa", "four-connected framework Ga", "3D"),  # NaTl type, diamond net
    ],
)
def test_zintl_phases(corpus, mp_id, formula, motif, dim):
    r = check(corpus / "mp-relaxed" / f"{mp_id}.cif")
    assert r.formula == formula
    assert r.verdict == "consistent", r.causes
    assert r.residual == pytest.approx(0.0)
    assert r.aa_observed == pytest.approx(r.aa_predicted)
    assert motif in r.polyanion and f"({dim})" in r.polyanion


def test_cab6_relaxed_closo(corpus):
    r = check(corpus / "mp-relaxed" / "mp-865.cif")
    assert r.verdict == "consistent" and r.causes == ["electron-deficient-cluster"]


def test_inse_in_in_bonds(corpus):
    # InSe: [Se-In-In-Se] layers with an In-In bond (In2+ formally).
    r = check(corpus / "mp-relaxed" / "mp-20485.cif")
    assert r.verdict == "consistent" and "cation-cation-bonds" in r.causes


def test_every_file_gives_a_result(corpus):
    files = sorted((corpus / "prototypes").glob("*.cif"))[::7] + sorted((corpus / "mp-relaxed").glob("*.cif"))[::40]
    results = check_all(files)
    assert len(results) == len(files)
    for r in results:
        assert r.status in ("ok", "error")
        if r.status == "error":
            assert r.error and "unexpected" not in r.error, (r.path, r.error)
        else:
            assert r.verdict in ("consistent", "mismatch", "not-applicable")
