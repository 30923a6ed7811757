"""Hostile and messy input: real-world CIF quirks, limits, archives, regression files.

Real structures come from ase's bundled COD mineral CIFs
(ase/test/testdata/minerals): breithauptite NiSb (COD 1010930, NiAs type,
Z = 2) and moissanite-3C SiC (COD 1010995, zinc-blende type, Z = 4); atom
counts per cell are those of the structure types (common practice, no source).
Rock salt (NaCl, a = 5.64 A, from memory) makes the large cells.
"""
from __future__ import annotations

import gzip
import io
import json
import os
import struct
import subprocess
import sys
import tarfile
import zipfile
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from bondcheck import limits
from bondcheck import read as read_module
from bondcheck.api import check_all
from bondcheck.read import iter_structure_files, read, read_blocks, read_cif_bytes
from bondcheck.record import Crystal, StructureError

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
BAD = HERE / "data" / "bad"
BAD_REASONS = json.loads((HERE / "data" / "bad_reasons.json").read_text())


def _minerals() -> Path:
    import ase
    return Path(ase.__file__).parent / "test" / "testdata" / "minerals"


NISB = "cod_1010930.cif"   # NiSb, P 63/m m c, Ni on 2a, Sb on 2c
SIC = "cod_1010995.cif"    # SiC, F -4 3 m, Si on 4a, C on 4c
NISB_ATOMS = {28: 2.0, 51: 2.0}
SIC_ATOMS = {14: 4.0, 6: 4.0}


def mineral(name: str) -> bytes:
    return (_minerals() / name).read_bytes()


def composition(c: Crystal) -> dict[int, float]:
    out: Counter = Counter()
    for z, o in zip(c.numbers.tolist(), c.occupancy.tolist()):
        out[z] += o
    return {z: round(v, 6) for z, v in out.items()}


def only(data: bytes | str, name: str = "inline.cif", **kw) -> Crystal:
    crystals = read_cif_bytes(data, name, **kw)
    assert len(crystals) == 1
    return crystals[0]


def _atom_rows(text: str) -> tuple[int, int]:
    """(first, last+1) line numbers of the rows of the atom-site loop."""
    lines = text.split("\n")
    start = next(i for i, x in enumerate(lines) if x.strip() == "_atom_site_label")
    i = start
    while lines[i].strip().startswith("_atom_site"):
        i += 1
    j = i
    while j < len(lines) and lines[j].strip() and not lines[j].lstrip().startswith(("loop_", "_", "#")):
        j += 1
    return i, j


# ---------------------------------------------------------------------------
# line ends, encodings, banners
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("how", ["crlf", "cr", "latin-1", "utf-16", "bom"])
def test_line_ends_and_encodings(how):
    data = mineral(NISB)
    if how == "crlf":
        data = data.replace(b"\n", b"\r\n")
    elif how == "cr":
        data = data.replace(b"\n", b"\r")
    elif how == "latin-1":
        data = b"# Gr\xfcn, Caf\xe9 \xa9 Kestrel Lab\n" + data
    elif how == "utf-16":
        data = data.decode("utf-8").encode("utf-16")
    else:
        data = b"\xef\xbb\xbf" + data
    c = only(data)
    assert composition(c) == NISB_ATOMS
    assert c.meta["spacegroup"] == "P 63/m m c"
    assert c.cell[0, 0] == pytest.approx(3.928) and c.cell[2, 2] == pytest.approx(5.12)


@pytest.mark.parametrize("banner", [
    "Copyright (c) 2031 Kestrel Lab, all rights reserved\n",
    "(C) Kestrel Lab sample archive, it's ours\nsecond line of the banner\n\n",
])
def test_leading_banner_without_hash(banner):
    c = only(banner.encode() + mineral(SIC))
    assert composition(c) == SIC_ATOMS
    assert c.meta["preamble_lines"] == banner.strip().count("\n") + 1


def test_text_before_any_block_that_is_not_a_banner_still_fails():
    with pytest.raises(StructureError, match="not a CIF file"):
        read_cif_bytes(b"Copyright 2031 Kestrel Lab\nno blocks here\n", "x.cif")


# ---------------------------------------------------------------------------
# blocks and tags
# ---------------------------------------------------------------------------

def test_concatenated_file_with_the_same_block_name_twice(tmp_path):
    path = tmp_path / "twice.cif"
    path.write_bytes(mineral(NISB) + b"\n" + mineral(NISB))
    crystals = read(path)
    assert [c.name for c in crystals] == ["1010930", "1010930_2"]
    assert [c.source for c in crystals] == [f"{path}#1010930", f"{path}#1010930_2"]
    assert all(composition(c) == NISB_ATOMS for c in crystals)
    assert read(path, block="1010930_2")[0].name == "1010930_2"


def test_repeated_tag_the_reader_does_not_use_is_let_through():
    text = mineral(NISB).decode().replace("_journal_year", "_journal_year 1900\n_journal_year", 1)
    assert text.count("_journal_year") == 2
    c = only(text)
    assert composition(c) == NISB_ATOMS
    assert c.meta["repeated_tags"] == ["_journal_year"]


def test_repeated_cell_tag_is_turned_away():
    text = mineral(NISB).decode().replace("_cell_length_c", "_cell_length_c 6.0\n_cell_length_c", 1)
    with pytest.raises(StructureError, match="duplicate tag _cell_length_c in data block '1010930'"):
        only(text)


def test_read_blocks_keeps_the_good_blocks(tmp_path):
    broken = mineral(SIC).decode().replace("data_1010995", "data_broken").replace(
        "_cell_length_a", "_cell_length_a 0\n_cell_length_q", 1)
    path = tmp_path / "two.cif"
    path.write_text(mineral(NISB).decode() + "\n" + broken)
    with pytest.raises(StructureError, match="data block 'broken': bad unit cell: length a = 0"):
        read(path)
    good, bad = read_blocks(path)
    assert isinstance(good, Crystal) and composition(good) == NISB_ATOMS
    assert isinstance(bad, StructureError) and bad.source == f"{path}#broken"
    assert "length a = 0 is not positive" in str(bad)
    assert [type(x) for x in read_blocks(_minerals() / SIC)] == [Crystal]


def _sic(symmetry: str, rows: list[str]) -> str:
    """SiC (COD 1010995: a = 4.348 A) written anew with the given symmetry and atom rows."""
    return ("data_sic\n_cell_length_a 4.348\n_cell_length_b 4.348\n_cell_length_c 4.348\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n" + symmetry + "\n"
            "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            "_atom_site_fract_z\n" + "\n".join(rows) + "\n")


def test_hall_symbol_under_the_name_tag():
    # F -4 3 m written as its Hall symbol, F -4 2 3, where the H-M name belongs
    c = only(_sic("_symmetry_space_group_name_H-M 'F -4 2 3'", ["Si1 Si 0 0 0", "C1 C 0.25 0.25 0.25"]))
    assert composition(c) == SIC_ATOMS
    assert c.meta["symmetry"] == "hall"
    assert composition(only(_sic("_space_group_name_Hall '-F 4 2 3'", ["Si1 Si 0 0 0"]))) == {14: 4.0}


# ---------------------------------------------------------------------------
# the same atom written twice
# ---------------------------------------------------------------------------

def test_site_written_twice_is_merged():
    text = mineral(NISB).decode()
    i, j = _atom_rows(text)
    lines = text.split("\n")
    sb = next(x for x in lines[i:j] if x.split()[0] == "Sb1")
    lines.insert(j, sb.replace("Sb1", "Sb2", 1))
    c = only("\n".join(lines))
    assert composition(c) == NISB_ATOMS
    assert c.meta["merged_duplicates"] == 2  # Sb on 2c: both images of the copy
    assert sorted(c.labels.tolist()) == ["Ni1", "Ni1", "Sb1", "Sb1"]


def test_atoms_listed_with_their_images_and_the_operators():
    # every atom of the SiC cell written out, and the F -4 3 m name too: the
    # images of each row fall on the other rows of its element
    c0 = read(_minerals() / SIC)[0]
    assert c0.cell[0, 0] == pytest.approx(4.348)
    rows = [f"{'Si' if z == 14 else 'C'}{k} {'Si' if z == 14 else 'C'} {x:.5f} {y:.5f} {w:.5f}"
            for k, (z, (x, y, w)) in enumerate(zip(c0.numbers.tolist(), c0.frac.tolist()))]
    c = only(_sic("_symmetry_space_group_name_H-M 'F -4 3 m'", rows))
    assert composition(c) == SIC_ATOMS
    assert c.meta["merged_duplicates"] == 8 * 4 - 8  # each row on a 4-fold position


def test_p1_cell_with_copies_on_opposite_faces():
    # a P 1 listing of SiC with the atoms at 0 repeated at 1 (as drawing
    # programs export 'all atoms in the box')
    c0 = read(_minerals() / SIC)[0]
    a = c0.cell[0, 0]
    rows = []
    for k, (z, (x, y, w)) in enumerate(zip(c0.numbers.tolist(), c0.frac.tolist())):
        sym = "Si" if z == 14 else "C"
        rows.append(f"{sym}{k} {sym} {x:.6f} {y:.6f} {w:.6f}")
        for shifted in ((x + 1, y, w), (x, y + 1, w), (x, y, w + 1)):
            if min(x, y, w) == 0:
                rows.append(f"{sym}{k}c {sym} {shifted[0]:.6f} {shifted[1]:.6f} {shifted[2]:.6f}")
    text = (f"data_box\n_cell_length_a {a}\n_cell_length_b {a}\n_cell_length_c {a}\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
            "loop_\n_atom_site_label\n_atom_site_type_symbol\n_atom_site_fract_x\n_atom_site_fract_y\n"
            "_atom_site_fract_z\n" + "\n".join(rows) + "\n")
    c = only(text)
    assert len(rows) > 8
    assert composition(c) == SIC_ATOMS
    assert c.meta["merged_duplicates"] == len(rows) - 8


def _nisb_with_extra(row: str) -> str:
    text = mineral(NISB).decode()
    i, j = _atom_rows(text)
    lines = text.split("\n")
    lines.insert(j, row)
    return "\n".join(lines)


def test_close_copy_within_tolerance_merged_farther_one_kept():
    # Sb1 of NiSb sits at 1/3, 2/3, 1/4 (c = 5.12 A); a copy 0.05 A along c
    # is the same atom, a copy 0.3 A along c is not
    near = only(_nisb_with_extra("Sb2 Sb3- 2 c 0.333333 0.666667 0.259766 1. 0 d"))  # +0.05 A
    # off the mirror the copy has four images (4f), each 0.05 A from an Sb
    assert composition(near) == NISB_ATOMS and near.meta["merged_duplicates"] == 4
    far = only(_nisb_with_extra("Sb2 Sb3- 2 c 0.333333 0.666667 0.308594 1. 0 d"))   # +0.30 A
    assert composition(far) == {28: 2.0, 51: 6.0} and "merged_duplicates" not in far.meta  # 2 + 4 (4f)
    # the bond stage then reports the two atoms as overlapping
    from bondcheck.api import check_crystal
    res = check_crystal(far)
    assert res.status == "error" and "overlapping atoms" in res.error


def test_half_occupied_pair_on_one_place_is_not_merged():
    # two half-occupied Sb entries at one place are a split site, not a copy
    half = only(_nisb_with_extra("Sb2 Sb3- 2 c 0.333333 0.666667 0.25 0.5 0 d").replace(
        "0.666666666666667 0.25 1.", "0.666666666666667 0.25 0.5"))
    assert composition(half) == NISB_ATOMS
    assert half.natoms == 6 and "merged_duplicates" not in half.meta


# ---------------------------------------------------------------------------
# occupancies, cells, coordinates
# ---------------------------------------------------------------------------

@pytest.mark.parametrize("value, words", [
    ("-0.2", "occupancy -0.2 of site 'Sb1' is not positive"),
    ("0", "occupancy 0 of site 'Sb1' is not positive"),
    ("1.5", "occupancy 1.5 of site 'Sb1' exceeds 1"),
    ("1e-7", "occupancy 1e-07 of site 'Sb1' is too small to be meant"),
])
def test_occupancy_out_of_range_names_the_site(value, words):
    text = mineral(NISB).decode().replace("0.666666666666667 0.25 1.", f"0.666666666666667 0.25 {value}")
    with pytest.raises(StructureError) as info:
        only(text)
    assert words in str(info.value)


@pytest.mark.parametrize("tag, value, words", [
    ("_cell_length_a", "?", "no unit cell: _cell_length_a missing"),
    ("_cell_length_b", "0", "length b = 0 is not positive"),
    ("_cell_length_c", "0.0(0)", "length c = 0 is not positive"),
    ("_cell_length_a", "1e400", "length a = inf is not positive"),
    ("_cell_angle_gamma", "0", "impossible cell angle: gamma = 0"),
    ("_cell_angle_gamma", "180", "impossible cell angle: gamma = 180"),
    ("_cell_angle_alpha", "1.5708", "impossible cell angles alpha=1.5708"),  # radians for degrees
])
def test_cells_that_are_no_cells(tag, value, words):
    text = mineral(NISB).decode()
    start = text.index(tag)
    end = text.index("\n", start)
    with pytest.raises(StructureError) as info:
        only(text[:start] + f"{tag} {value}" + text[end:])
    assert words in str(info.value)


def test_missing_cell_length_line():
    text = mineral(NISB).decode()
    start = text.index("_cell_length_b")
    with pytest.raises(StructureError, match="no unit cell: _cell_length_b missing"):
        only(text[:start] + text[text.index("\n", start) + 1:])


def test_angles_of_a_cell_with_no_volume():
    text = mineral(SIC).decode()
    for tag, v in (("_cell_angle_alpha", "120"), ("_cell_angle_beta", "120"), ("_cell_angle_gamma", "120")):
        start = text.index(tag)
        text = text[:start] + f"{tag} {v}" + text[text.index("\n", start):]
    with pytest.raises(StructureError, match="alpha=120, beta=120, gamma=120: the cell has no volume"):
        only(text)


def test_same_checks_for_objects_from_other_formats():
    from ase import Atoms
    squashed = Atoms("NaCl", scaled_positions=[[0, 0, 0], [0.5, 0.5, 0.5]],
                     cell=[[5.64, 0, 0], [5.64, 0.005, 0], [0, 0, 5.64]], pbc=True)
    with pytest.raises(StructureError, match="between the faces"):
        read(squashed)
    dense = Atoms("NaCl", scaled_positions=[[0, 0, 0], [0.5, 0.5, 0.5]], cell=[0.564] * 3, pbc=True)
    with pytest.raises(StructureError, match="implausible cell"):
        read(dense)


# ---------------------------------------------------------------------------
# regression files, through the whole pipeline
# ---------------------------------------------------------------------------

def test_regression_files_are_all_listed():
    assert {p.name for p in BAD.iterdir()} == set(BAD_REASONS)
    for name, entry in BAD_REASONS.items():
        assert entry["reason"], name


@pytest.mark.parametrize("name", sorted(BAD_REASONS))
def test_regression_file_gives_one_error_row(name):
    rows = check_all([BAD / name])
    assert len(rows) == 1
    r = rows[0]
    assert r.status == "error" and r.verdict is None
    assert BAD_REASONS[name]["reason"] in r.error
    assert "\n" not in r.error and len(r.error) < 200
    assert "unexpected" not in r.error and "Error:" not in r.error


# ---------------------------------------------------------------------------
# limits
# ---------------------------------------------------------------------------

def test_defaults_are_the_documented_ones():
    doc = (ROOT / "docs" / "limits.md").read_text()
    d = limits.Limits()
    assert d.max_atoms == limits.MAX_ATOMS == 50_000 and "50,000" in doc
    assert d.max_bytes == 64 * 2**20 and "64 MB" in doc
    assert d.max_archive_bytes == 64 * 2**30 and "64 GB" in doc
    assert d.max_archive_entries == 2_000_000 and "2,000,000" in doc
    for option in ("--max-atoms", "--max-file-mb", "BONDCHECK_MAX_ATOMS", "BONDCHECK_MAX_FILE_MB",
                   "BONDCHECK_MAX_ARCHIVE_GB", "BONDCHECK_MAX_ARCHIVE_ENTRIES", "max_atoms=", "max_bytes="):
        assert option in doc, option


def test_file_size_limit(tmp_path):
    path = tmp_path / "sic.cif"
    path.write_bytes(mineral(SIC))
    size = path.stat().st_size
    with pytest.raises(StructureError, match=r"file is 3\.33 kB, over the limit of 1 kB"):
        read(path, max_bytes=1024)
    assert composition(read(path, max_bytes=size)[0]) == SIC_ATOMS
    with limits.applied(max_bytes=1024):
        (row,) = check_all([path])
    assert row.status == "error" and "over the limit" in row.error
    (row,) = check_all([path])
    assert row.status == "ok"


def test_gzip_bomb_stops_at_the_limit(tmp_path):
    # 100 MB of comment lines after a real CIF, gzipped to about 100 kB
    path = tmp_path / "bomb.cif.gz"
    with gzip.open(path, "wb", compresslevel=9) as fh:
        fh.write(mineral(SIC))
        line = b"#" * 1023 + b"\n"
        for _ in range(100):
            fh.write(line * 1024)
    assert path.stat().st_size < 300_000
    with pytest.raises(StructureError, match=r"file \(uncompressed\) is more than 64 MB, over the limit of 64 MB"):
        read(path)
    assert composition(read(path, max_bytes=110 * 2**20)[0]) == SIC_ATOMS


def test_capped_reading_never_holds_more_than_the_limit():
    class Endless(io.RawIOBase):
        asked = 0

        def readable(self):
            return True

        def readinto(self, b):
            self.asked += len(b)
            b[:] = b"#" * len(b)
            return len(b)

    src = Endless()
    with pytest.raises(StructureError, match="more than"):
        limits.read_capped(io.BufferedReader(src), 5 * 2**20)
    assert src.asked < 8 * 2**20


def _rock_salt_p1(n: int) -> str:
    """A P 1 rock-salt supercell of n x n x n conventional cells (8 n^3 atoms)."""
    a = 5.64 * n
    base = np.array([[0, 0, 0], [0, 0.5, 0.5], [0.5, 0, 0.5], [0.5, 0.5, 0]])
    grid = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).reshape(-1, 1, 3)
    na = ((grid + base) / n).reshape(-1, 3)
    cl = (na + [0.5 / n, 0, 0]) % 1.0
    rows = [f"Na{k} Na {x:.6f} {y:.6f} {z:.6f}" for k, (x, y, z) in enumerate(na.tolist())]
    rows += [f"Cl{k} Cl {x:.6f} {y:.6f} {z:.6f}" for k, (x, y, z) in enumerate(cl.tolist())]
    return (f"data_rock_salt_{n}\n_cell_length_a {a}\n_cell_length_b {a}\n_cell_length_c {a}\n"
            "_cell_angle_alpha 90\n_cell_angle_beta 90\n_cell_angle_gamma 90\n"
            "_symmetry_space_group_name_H-M 'P 1'\nloop_\n_atom_site_label\n_atom_site_type_symbol\n"
            "_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n" + "\n".join(rows) + "\n")


@pytest.fixture(scope="module")
def big_cell(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("big") / "rock_salt_216000.cif"
    path.write_text(_rock_salt_p1(30))
    return path


def _no_expansion(*args, **kwargs):
    raise AssertionError("the cell was expanded before the atom limit was checked")


def test_200000_atom_cell_turned_away_before_expansion(big_cell, monkeypatch):
    monkeypatch.setattr(read_module, "_expand", _no_expansion)
    monkeypatch.setattr(read_module, "_elements", _no_expansion)  # not even the element table
    with pytest.raises(StructureError, match=r"holds at least 216,000 atoms, over the limit of 50,000"):
        read(big_cell)
    monkeypatch.undo()
    (row,) = check_all([big_cell])
    assert row.status == "error" and "over the limit of 50,000" in row.error


def test_200000_atom_cell_accepted_with_a_raised_limit(big_cell):
    # A full check of 216,000 atoms takes far too long for a test (the site
    # symmetry search grows with the square of the atoms), so the raised
    # limit is shown by reading the cell and running the bond stage on it.
    from bondcheck.bonds import find_contacts

    (c,) = read(big_cell, max_atoms=300_000)
    assert c.natoms == 216_000 and composition(c) == {11: 108_000.0, 17: 108_000.0}
    contacts = find_contacts(c)
    # rock salt: six Na-Cl contacts at a/2 = 2.82 A around every atom
    near = contacts.d < 3.0
    assert near.sum() == 216_000 * 6 // 2
    np.testing.assert_allclose(contacts.d[near], 2.82, atol=1e-3)
    assert set(np.unique(c.numbers[contacts.i[near]] + c.numbers[contacts.j[near]]).tolist()) == {28}


def _general_sites(n: int, a: float) -> str:
    rng = np.random.default_rng(7)
    xyz = rng.random((n, 3)) * [0.45, 0.2, 0.1] + [0.02, 0.02, 0.01]  # away from mirror planes
    rows = [f"C{k} C {x:.5f} {y:.5f} {z:.5f}" for k, (x, y, z) in enumerate(xyz.tolist())]
    return (f"data_many\n_cell_length_a {a}\n_cell_length_b {a}\n_cell_length_c {a}\n"
            "_symmetry_space_group_name_H-M 'F m -3 m'\nloop_\n_atom_site_label\n_atom_site_type_symbol\n"
            "_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n" + "\n".join(rows) + "\n")


def test_symmetry_expansion_counted_before_it_is_done(monkeypatch):
    # 1100 sites in F m -3 m (192 operations): about 200,000 atoms from a 50 kB file
    text = _general_sites(1100, 120.0)
    monkeypatch.setattr(read_module, "_expand", _no_expansion)
    with pytest.raises(StructureError) as info:
        only(text)
    msg = str(info.value)
    assert "over the limit of 50,000" in msg
    counted = int(msg.split("holds ")[1].split(" atoms")[0].replace(",", ""))
    assert 1100 * 96 <= counted <= 1100 * 192
    monkeypatch.undo()
    c = only(text, max_atoms=250_000)
    assert c.natoms + c.meta.get("merged_duplicates", 0) == counted


def test_limits_from_environment_context_and_call(monkeypatch, tmp_path):
    path = tmp_path / "sic.cif"
    path.write_bytes(mineral(SIC))
    monkeypatch.setenv("BONDCHECK_MAX_ATOMS", "4")
    assert limits.current().max_atoms == 4
    with pytest.raises(StructureError, match="holds 8 atoms, over the limit of 4"):
        read(path)
    with limits.applied(max_atoms=8):
        assert composition(read(path)[0]) == SIC_ATOMS
        with pytest.raises(StructureError, match="over the limit of 7"):
            read(path, max_atoms=7)
    monkeypatch.setenv("BONDCHECK_MAX_ATOMS", "many")
    with pytest.raises(StructureError, match="BONDCHECK_MAX_ATOMS"):
        read(path)
    monkeypatch.delenv("BONDCHECK_MAX_ATOMS")
    with pytest.raises(ValueError):
        limits.Limits().but(max_atoms=0)


def test_cli_limit_options(tmp_path):
    path = tmp_path / "sic.cif"
    path.write_bytes(mineral(SIC))
    cmd = [sys.executable, "-m", "bondcheck.cli", "check", str(path), "--format", "json"]
    env = {k: v for k, v in os.environ.items() if not k.startswith("BONDCHECK_")}
    for extra, words in ((["--max-atoms", "4"], "holds 8 atoms, over the limit of 4"),
                         (["--max-file-mb", "0.001"], "over the limit of 1.02 kB")):
        out = subprocess.run(cmd + extra, capture_output=True, text=True, cwd=ROOT, env=env, timeout=120)
        assert out.returncode == 2, out.stderr
        (row,) = json.loads(out.stdout)
        assert row["status"] == "error" and words in row["error"]
    out = subprocess.run(cmd + ["--max-atoms", "8"], capture_output=True, text=True, cwd=ROOT, env=env, timeout=120)
    assert out.returncode == 0 and json.loads(out.stdout)[0]["status"] == "ok"
    bad = subprocess.run(cmd + ["--max-atoms", "-3"], capture_output=True, text=True, cwd=ROOT, env=env, timeout=120)
    assert bad.returncode == 2 and "positive" in bad.stderr


# ---------------------------------------------------------------------------
# archives and folders (bondcheck scan)
# ---------------------------------------------------------------------------

def _scan_rows(inputs) -> dict[str, dict]:
    from bondcheck.scan import Scanner

    rows = {}
    for r in Scanner([str(p) for p in inputs], store=None, executor="inline").rows():
        assert r["path"] not in rows
        rows[r["path"]] = r
    return rows


def test_zip_slip_names_are_reported_and_nothing_is_written(tmp_path, monkeypatch):
    work = tmp_path / "a" / "b" / "c"
    work.mkdir(parents=True)
    archive = work / "slip.zip"
    with zipfile.ZipFile(archive, "w") as zf:
        zf.writestr("good/sic.cif", mineral(SIC))
        zf.writestr("../../evil.cif", mineral(SIC))
        zf.writestr("../../../evil.vasp", b"not read\n")
        zf.writestr("/tmp/evil_abs.cif", mineral(SIC))
        zf.writestr("..\\..\\evil_win.cif", mineral(SIC))
        zf.writestr("C:/evil_drive.cif", mineral(SIC))
    monkeypatch.chdir(work)
    before = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    rows = _scan_rows([archive])
    after = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*"))
    assert after == before
    assert not Path("/tmp/evil_abs.cif").exists()
    assert rows[f"{archive}::good/sic.cif"]["status"] == "ok"
    unsafe = [k for k in rows if "evil" in k]
    assert len(unsafe) == 5
    for k in unsafe:
        assert rows[k]["status"] == "error" and "unsafe member name" in rows[k]["error"]


def _patch_declared_size(data: bytes, size: int) -> bytes:
    """Make a one-member zip claim an uncompressed size it does not have."""
    b = bytearray(data)
    assert b[:4] == b"PK\x03\x04"
    struct.pack_into("<I", b, 22, size)
    cd = b.rindex(b"PK\x01\x02")
    struct.pack_into("<I", b, cd + 24, size)
    return bytes(b)


def test_zip_bomb_within_the_cap(tmp_path):
    # about 1 kB of zip holding 65 MB of comment: turned away on its declared size
    bomb = tmp_path / "bomb.zip"
    with zipfile.ZipFile(bomb, "w", compression=zipfile.ZIP_BZIP2) as zf:
        zf.writestr("bomb.cif", b"#" * (65 * 2**20))
    assert bomb.stat().st_size < 2048
    # a member lying about its size (declares 3 kB, holds 8 MB): the reading
    # stops at what it declared
    liar = tmp_path / "liar.zip"
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_BZIP2) as zf:
        zf.writestr("liar.cif", mineral(SIC) + b"#" * 2**23)
    liar.write_bytes(_patch_declared_size(buf.getvalue(), 3000))
    rows = _scan_rows([bomb, liar])
    assert set(rows) == {f"{bomb}::bomb.cif", f"{liar}::liar.cif"}
    r = rows[f"{bomb}::bomb.cif"]
    assert r["status"] == "error" and "archive member is 65 MB, over the limit of 64 MB" in r["error"]
    r = rows[f"{liar}::liar.cif"]
    assert r["status"] == "error" and r["error"].startswith("cannot read archive member")


def test_archive_totals_and_member_counts(tmp_path):
    archive = tmp_path / "many.zip"
    with zipfile.ZipFile(archive, "w") as zf:
        for k in range(5):
            zf.writestr(f"m{k}.cif", mineral(SIC))
    with limits.applied(max_archive_entries=3):
        rows = _scan_rows([archive])
    assert list(rows) == [f"{archive}::"]
    assert "holds 5 members, over the limit of 3: not read" in rows[f"{archive}::"]["error"]
    with limits.applied(max_archive_bytes=2 * len(mineral(SIC)) + 10):
        rows = _scan_rows([archive])
    assert [rows[f"{archive}::m{k}.cif"]["status"] for k in range(2)] == ["ok", "ok"]
    assert "the members from here on are not read" in rows[f"{archive}::"]["error"]
    assert len(rows) == 3
    tgz = tmp_path / "many.tar.gz"
    with tarfile.open(tgz, "w:gz") as tf:
        for k in range(5):
            info = tarfile.TarInfo(f"m{k}.cif")
            info.size = len(mineral(SIC))
            tf.addfile(info, io.BytesIO(mineral(SIC)))
    with limits.applied(max_archive_entries=3):
        rows = _scan_rows([tgz])
    assert [rows[f"{tgz}::m{k}.cif"]["status"] for k in range(3)] == ["ok"] * 3
    assert "holds more than 3 members" in rows[f"{tgz}::"]["error"]


def test_links_in_archives_are_not_followed(tmp_path):
    tgz = tmp_path / "links.tar.gz"
    with tarfile.open(tgz, "w:gz") as tf:
        sym = tarfile.TarInfo("sym.cif")
        sym.type, sym.linkname = tarfile.SYMTYPE, "/etc/passwd"
        tf.addfile(sym)
        hard = tarfile.TarInfo("hard.cif")
        hard.type, hard.linkname = tarfile.LNKTYPE, "../../outside.cif"
        tf.addfile(hard)
        up = tarfile.TarInfo("../up.cif")
        up.size = len(mineral(SIC))
        tf.addfile(up, io.BytesIO(mineral(SIC)))
        ok = tarfile.TarInfo("ok.cif")
        ok.size = len(mineral(SIC))
        tf.addfile(ok, io.BytesIO(mineral(SIC)))
    zpath = tmp_path / "links.zip"
    with zipfile.ZipFile(zpath, "w") as zf:
        info = zipfile.ZipInfo("zlink.cif")
        info.external_attr = 0o120777 << 16  # a symbolic link, as Info-ZIP stores one
        zf.writestr(info, "/etc/passwd")
    rows = _scan_rows([tgz, zpath])
    assert rows[f"{tgz}::ok.cif"]["status"] == "ok"
    for name in (f"{tgz}::sym.cif", f"{tgz}::hard.cif", f"{zpath}::zlink.cif"):
        assert rows[name]["status"] == "error" and "link inside an archive is not followed" in rows[name]["error"]
    assert "unsafe member name" in rows[f"{tgz}::../up.cif"]["error"]


def test_folder_with_a_link_back_up_is_walked_once(tmp_path):
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "sic.cif").write_bytes(mineral(SIC))
    os.symlink("..", tmp_path / "sub" / "up")
    rows = _scan_rows([tmp_path])
    assert list(rows) == [str(tmp_path / "sub" / "sic.cif")]
    assert list(iter_structure_files(tmp_path)) == [tmp_path / "sub" / "sic.cif"]


def test_bz2_of_real_cif_through_archive_reader(tmp_path):
    # members compressed with bzip2 read like stored ones
    archive = tmp_path / "bz.zip"
    with zipfile.ZipFile(archive, "w", compression=zipfile.ZIP_BZIP2) as zf:
        zf.writestr("nisb.cif", mineral(NISB))
    rows = _scan_rows([archive])
    assert rows[f"{archive}::nisb.cif"]["status"] == "ok"
    assert rows[f"{archive}::nisb.cif"]["formula"] == "NiSb"
