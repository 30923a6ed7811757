"""Command line, JSON contract and bad input."""
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from .conftest import ROOT

GOOD = """data_sic
_cell_length_a 4.3596
_cell_length_b 4.3596
_cell_length_c 4.3596
_cell_angle_alpha 90
_cell_angle_beta 90
_cell_angle_gamma 90
_symmetry_space_group_name_H-M 'F -4 3 m'
loop_
_symmetry_equiv_pos_as_xyz
x,y,z
loop_
_atom_site_label
_atom_site_type_symbol
_atom_site_fract_x
_atom_site_fract_y
_atom_site_fract_z
Si1 Si 0 0 0
C1 C 0.25 0.25 0.25
"""

BAD = {
    "empty.cif": b"",
    "junk.cif": bytes(range(256)) * 8,
    "truncated.cif": GOOD[: GOOD.index("_atom_site_fract_y")].encode(),
    "nocell.cif": b"data_x\nloop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\nSi1 Si 0 0 0\n",
    "flat.cif": GOOD.replace("_cell_angle_gamma 90", "_cell_angle_gamma 180").encode(),
    # Two different fully occupied atoms on one spot (a repeated line of the same atom is merged instead).
    "overlap.cif": GOOD.replace("C1 C 0.25 0.25 0.25", "C1 C 0.25 0.25 0.25\nSi2 Si 0.2501 0.25 0.25").encode(),
    "unknown.cif": GOOD.replace("C1 C 0.25", "Q1 Qq 0.25").encode(),
}


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "bondcheck.cli", *args], capture_output=True, text=True, cwd=cwd, timeout=300)


@pytest.fixture()
def mixed_dir(tmp_path, minerals):
    for name, data in BAD.items():
        (tmp_path / name).write_bytes(data)
    shutil.copy(minerals / "cod_1010995.cif", tmp_path / "moissanite.cif")
    shutil.copy(minerals / "cod_9017338.cif", tmp_path / "cristobalite.cif")
    return tmp_path


def test_bad_inputs_get_error_rows_and_the_rest_is_checked(mixed_dir):
    p = run("check", str(mixed_dir), "--format", "json")
    assert p.returncode == 2, p.stderr
    assert "Traceback" not in p.stderr
    rows = {Path(r["path"]).name: r for r in json.loads(p.stdout)}
    assert set(rows) == set(BAD) | {"moissanite.cif", "cristobalite.cif"}
    for name in BAD:
        r = rows[name]
        assert r["status"] == "error", (name, r)
        assert r["error"] and "\n" not in r["error"] and len(r["error"]) < 300, (name, r["error"])
        assert r["verdict"] is None
    # Well-known structures (ase's bundled COD 1010995 and 9017338) still come out consistent.
    assert rows["moissanite.cif"]["verdict"] == "consistent"
    assert rows["cristobalite.cif"]["verdict"] == "consistent"
    assert "overlap" in rows["overlap.cif"]["error"]
    assert "Qq" in rows["unknown.cif"]["error"] or "element" in rows["unknown.cif"]["error"]


def test_json_contract(minerals):
    p = run("check", str(minerals / "cod_9004218.cif"), "--format", "json")
    assert p.returncode == 0
    (r,) = json.loads(p.stdout)
    for key in ("path", "status", "error", "formula", "verdict", "causes", "cations", "anions", "vec_anion",
                "aa_predicted", "aa_observed", "cc_observed", "residual", "sites"):
        assert key in r
    assert r["status"] == "ok" and r["error"] is None
    for key in ("vec_anion", "aa_predicted", "aa_observed", "cc_observed", "residual"):
        assert isinstance(r[key], float) and round(r[key], 3) == r[key]
    for s in r["sites"]:
        for key in ("label", "element", "multiplicity", "wyckoff", "role", "bonds", "formal_charge", "nearest", "first_unbonded", "gap"):
            assert key in s
    # Cobaltite, COD 9004218 (Pca2_1): three sites, all on 4a.
    assert sorted((s["element"], s["multiplicity"], s["wyckoff"]) for s in r["sites"]) == [("As", 4, "a"), ("Co", 4, "a"), ("S", 4, "a")]


def test_exit_status_mismatch(tmp_path, minerals):
    # Cristobalite (ase's bundled COD 9017338) with its Si site typed as Al: "AlO2" leaves
    # each O half an electron short (VEC 7.5), so the count cannot close.
    text = (minerals / "cod_9017338.cif").read_text().replace("\nSi 0.30070", "\nAl 0.30070")
    (tmp_path / "al_cristobalite.cif").write_text(text)
    p = run("check", str(tmp_path / "al_cristobalite.cif"), "--format", "json")
    assert p.returncode == 1
    (r,) = json.loads(p.stdout)
    assert r["verdict"] == "mismatch"
    assert r["vec_anion"] == pytest.approx(7.5)
    assert r["residual"] == pytest.approx(-0.5)


def test_options_anions_and_valence(minerals):
    # Forcing S alone as the anion in cobaltite leaves As bonded as a cation: stated in the output.
    p = run("check", str(minerals / "cod_9004218.cif"), "--format", "json", "--anions", "S")
    (r,) = json.loads(p.stdout)
    assert r["anions"] == ["S"] and "--anions" in r["partition"]
    p = run("check", str(minerals / "cod_9004218.cif"), "--valence", "Co=x")
    assert p.returncode == 2 and "valence" in p.stderr
    p = run("check", str(minerals / "cod_9004218.cif"), "--anions", "Xx")
    assert p.returncode == 2


def test_explain_lists_and_explains():
    p = run("explain")
    assert p.returncode == 0 and "lone-pairs" in p.stdout
    p = run("explain", "lone-pairs")
    assert p.returncode == 0 and "What to check next" in p.stdout
    assert run("explain", "no-such-finding").returncode == 2


def test_readme_first_command_on_samples():
    """The README's first command: bondcheck check sample_structures."""
    readme = (ROOT / "README.md").read_text()
    assert "pip install . && bondcheck check sample_structures" in readme
    exe = shutil.which("bondcheck")
    cmd = [exe] if exe else [sys.executable, "-m", "bondcheck.cli"]
    p = subprocess.run(cmd + ["check", "sample_structures", "--format", "json"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    rows = {Path(r["path"]).name: r for r in json.loads(p.stdout)}
    assert p.returncode == 2  # KB-08 is deliberately unreadable
    assert len(rows) == len(list((ROOT / "sample_structures").glob("*.cif")))
    assert rows["KB-01_mg2si_ingot.cif"]["verdict"] == "consistent"
    assert rows["KB-03_pbo_red.cif"]["causes"] == ["lone-pairs"]
    assert rows["KB-04_mg2ge_relabel.cif"]["verdict"] == "mismatch"
    assert rows["KB-05_cu3au_foil.cif"]["verdict"] == "not-applicable"
    assert rows["KB-08_truncated_upload.cif"]["status"] == "error"
    text = subprocess.run(cmd + ["check", "sample_structures"], cwd=ROOT, capture_output=True, text=True, timeout=300).stdout
    assert "does not prove a structure right" in text


def test_help_is_fast_and_light():
    code = "import sys, bondcheck.cli; bondcheck.cli.build_parser(); print(sorted(m for m in ('pymatgen', 'ase', 'matplotlib', 'dask', 'spglib') if m in sys.modules))"
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert p.stdout.strip() == "[]", p.stdout


def test_no_symmetry_option_same_count(minerals):
    # Cobaltite (ase's bundled COD 9004218): the count does not depend on the space-group search.
    full = json.loads(run("check", str(minerals / "cod_9004218.cif"), "--format", "json").stdout)[0]
    fast = json.loads(run("check", str(minerals / "cod_9004218.cif"), "--format", "json", "--no-symmetry").stdout)[0]
    for key in ("verdict", "anions", "vec_anion", "aa_observed", "cc_observed", "residual"):
        assert fast[key] == full[key]
    assert fast["spacegroup"] == "" and all(s["wyckoff"] is None for s in fast["sites"])
    assert full["spacegroup"].startswith("Pca2_1")


def test_bad_block_does_not_cost_the_good_one(tmp_path, minerals):
    # Moissanite (ase's bundled COD 1010995) followed by a block with an unknown element.
    good = (minerals / "cod_1010995.cif").read_text()
    bad = "\ndata_broken\n_cell_length_a 4.0\n_cell_length_b 4.0\n_cell_length_c 4.0\nloop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\nQ1 Qq 0 0 0\n"
    (tmp_path / "two.cif").write_text(good + bad)
    p = run("check", str(tmp_path / "two.cif"), "--format", "json")
    rows = json.loads(p.stdout)
    assert p.returncode == 2 and len(rows) == 2
    assert sorted(r["status"] for r in rows) == ["error", "ok"]
    ok = next(r for r in rows if r["status"] == "ok")
    assert ok["verdict"] == "consistent" and ok["vec_anion"] == 8.0


def test_unexpected_exception_in_one_structure_keeps_the_rest(tmp_path, monkeypatch):
    """A bug that raises in one structure (simulated: the count raises for the
    block named 'sic_b') gives that structure an error result with its path,
    name and time; the other structure is checked as usual, both by
    check_all and by the stage-by-stage check_crystals a scan worker uses.
    The structure is zinc-blende SiC (a = 4.3596 A, from memory): Si-C bonds
    only, no anion-anion bonds (common practice, no source)."""
    import bondcheck.api as api
    from bondcheck.read import read

    (tmp_path / "a.cif").write_text(GOOD)
    (tmp_path / "b.cif").write_text(GOOD.replace("data_sic", "data_sic_b"))
    real = api.count

    def broken(crystal, *args, **kwargs):
        if crystal.name == "sic_b":
            raise TypeError("simulated bug")
        return real(crystal, *args, **kwargs)

    monkeypatch.setattr(api, "count", broken)
    files = [str(tmp_path / "a.cif"), str(tmp_path / "b.cif")]
    crystals = [c for f in files for c in read(f)]
    for good, bad in (api.check_all(files), api.check_crystals(crystals)):
        assert good.status == "ok" and good.name == "sic" and good.aa_observed == 0.0
        assert good.formula == "SiC"
        assert bad.status == "error" and bad.error == "unexpected TypeError: simulated bug"
        assert bad.name == "sic_b" and bad.path.endswith("b.cif") and bad.seconds > 0
