"""Scans of whole collections: every entry accounted for, results equal to
one-at-a-time checks, resume after an interruption, timeouts, Dask.

Structures are real: ase's bundled COD mineral CIFs (ase/test/testdata/minerals)
and pymatgen's bundled structures (pymatgen/util/structures), copied into
tmp_path, zipped, tarred or put into an ase database there; broken files are
made in the test."""
from __future__ import annotations

import json
import os
import re
import shutil
import signal
import sqlite3
import subprocess
import sys
import tarfile
import time
import zipfile
from pathlib import Path

import pytest

import bondcheck
from bondcheck.scan import Scanner, Tally, read_rows, render_summary, scan, summarize, worth_a_look

ase = pytest.importorskip("ase")
MINERALS = Path(ase.__file__).parent / "test" / "testdata" / "minerals"
pymatgen_util = pytest.importorskip("pymatgen.util")
PMG = Path(pymatgen_util.__file__).parent / "structures"

# COD entries bundled with ase (formulas as bondcheck reads them):
SIC = "cod_1010995.cif"      # SiC, F-43m (zincblende)
QUARTZ = "cod_9017338.cif"   # SiO2, P4_12_12 (cristobalite-type)
COASS_1 = "cod_9004112.cif"  # CoAsS, P2_1
COASS_2 = "cod_9004218.cif"  # CoAsS, Pca2_1
NI3S2 = "cod_9007640.cif"    # Ni3S2 (heazlewoodite), R32
MOS2 = "cod_9007661.cif"     # MoS2, R3m

TIMING = ("seconds", "entry_seconds")


def _strip(row: dict) -> dict:
    return {k: v for k, v in row.items() if k not in TIMING}


def _by_entry(rows) -> dict[str, dict]:
    out: dict[str, dict] = {}
    for r in rows:
        assert r["path"] not in out, f"row for {r['path']} twice"
        out[r["path"]] = r
    return out


@pytest.fixture(scope="module")
def mixed(tmp_path_factory):
    """A collection with good files, broken files, a zip, a tar.gz and ase
    databases.  Returns (root, {entry id: expected status})."""
    import ase.db
    import ase.io

    root = tmp_path_factory.mktemp("collection")
    exp: dict[str, str] = {}

    def put(rel: str, data: bytes, status: str | None) -> Path:
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_bytes(data)
        if status:
            exp[str(p)] = status
        return p

    for name in (SIC, QUARTZ, COASS_1, MOS2):
        put(f"minerals/{name}", (MINERALS / name).read_bytes(), "ok")
    for name in ("K2O2.json", "Li2O.json"):
        put(f"json/{name}", (PMG / name).read_bytes(), "ok")
    quartz = (MINERALS / QUARTZ).read_bytes()
    cut = quartz.find(b"_atom_site_fract_z") + 60  # ends inside the atom-site loop
    put("broken/truncated.cif", quartz[:cut], "error")
    put("broken/empty.cif", b"", "error")
    put("broken/junk.cif", bytes(range(256)) * 8, "error")
    put("broken/not-a-structure.json", b'{"sample": "LX-7", "note": "no lattice here"}', "error")
    put("broken/no-atoms.cif", b"data_lx7\n_cell_length_a 5.0\n_cell_length_b 5.0\n_cell_length_c 5.0\n", "error")
    put(".hidden/skipped.cif", (MINERALS / SIC).read_bytes(), None)
    put("minerals/readme.txt", b"not a structure, not an entry", None)

    # a zip: two CIFs, a POSCAR written by ase, a broken CIF, a nested archive
    # (reported, not read) and a file that is no entry
    poscar = root / "_poscar_tmp"
    ase.io.write(poscar, ase.io.read(MINERALS / MOS2), format="vasp")
    zpath = root / "bundle.zip"
    with zipfile.ZipFile(zpath, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr(f"set-a/{SIC}", (MINERALS / SIC).read_bytes())
        zf.writestr(f"set-a/{NI3S2}", (MINERALS / NI3S2).read_bytes())
        zf.writestr("set-b/POSCAR", poscar.read_bytes())
        zf.writestr("set-b/cut.cif", quartz[:300])
        zf.writestr("set-b/inner.zip", b"PK")
        zf.writestr("set-b/README.txt", b"lab notes")
    poscar.unlink()
    for member, st in ((f"set-a/{SIC}", "ok"), (f"set-a/{NI3S2}", "ok"), ("set-b/POSCAR", "ok"),
                       ("set-b/cut.cif", "error"), ("set-b/inner.zip", "error")):
        exp[f"{zpath}::{member}"] = st

    tpath = root / "drop" / "bundle.tar.gz"
    tpath.parent.mkdir()
    with tarfile.open(tpath, "w:gz") as tf:
        for name, data in ((COASS_2, (MINERALS / COASS_2).read_bytes()),
                           ("Li2O2.json", (PMG / "Li2O2.json").read_bytes()),
                           ("notes.md", b"# notes")):
            info = tarfile.TarInfo(name)
            info.size = len(data)
            import io

            tf.addfile(info, io.BytesIO(data))
    exp[f"{tpath}::{COASS_2}"] = "ok"
    exp[f"{tpath}::Li2O2.json"] = "ok"

    dbpath = root / "rows.db"
    with ase.db.connect(dbpath) as db:
        for name in (SIC, QUARTZ, MOS2):
            db.write(ase.io.read(MINERALS / name), name=name[:-4])
    for i in (1, 2, 3):
        exp[f"{dbpath}::id={i}"] = "ok"

    put("bad.zip", b"this is not a zip archive", "error")
    other = root / "other.db"
    con = sqlite3.connect(other)
    con.execute("CREATE TABLE samples (id INTEGER, name TEXT)")
    con.commit()
    con.close()
    exp[str(other)] = "error"
    return root, exp


@pytest.fixture(scope="module")
def mixed_scan(mixed, tmp_path_factory):
    root, _ = mixed
    out = tmp_path_factory.mktemp("out")
    files = [str(out / f"r.{ext}") for ext in ("jsonl", "csv", "parquet")]
    store = out / "store.sqlite"
    tally = scan([str(root)], out=files, store=str(store), jobs=2, progress=False)
    rows = list(read_rows(files[0]))
    return tally, rows, files, store


def test_every_entry_accounted_for(mixed, mixed_scan):
    _, exp = mixed
    tally, rows, _, _ = mixed_scan
    got = _by_entry(rows)
    assert set(got) == set(exp)
    for entry, status in exp.items():
        assert got[entry]["status"] == status, (entry, got[entry].get("error"))
        assert got[entry]["entry"] == entry
    assert tally.entries == len(exp)
    assert tally.status["ok"] == sum(1 for s in exp.values() if s == "ok")
    assert tally.status["error"] == sum(1 for s in exp.values() if s == "error")


def test_errors_say_why(mixed, mixed_scan):
    root, _ = mixed
    got = _by_entry(mixed_scan[1])
    assert "empty" in got[str(root / "broken/empty.cif")]["error"]
    assert "binary" in got[str(root / "broken/junk.cif")]["error"]
    assert "CIF" in got[str(root / "broken/truncated.cif")]["error"]
    assert "atom" in got[str(root / "broken/no-atoms.cif")]["error"]
    assert "unpack" in got[f"{root / 'bundle.zip'}::set-b/inner.zip"]["error"]
    assert "zip" in got[str(root / "bad.zip")]["error"]
    assert "ase database" in got[str(root / "other.db")]["error"]


def test_rows_equal_single_checks(mixed, mixed_scan):
    """A scanned entry gives what `bondcheck.check` gives for the same
    structure with the scan's default settings (sites grouped by environment)."""
    import ase.db

    root, exp = mixed
    got = _by_entry(mixed_scan[1])
    keys = ("formula", "spacegroup", "verdict", "causes", "vec_anion", "aa_observed", "residual", "sites", "findings")
    fast = bondcheck.Options(symmetry=False)
    pairs = []
    for entry, st in exp.items():
        if st == "ok" and "::" not in entry:
            pairs.append((entry, bondcheck.check(entry, options=fast)))
    pairs.append((f"{root / 'bundle.zip'}::set-a/{NI3S2}", bondcheck.check(MINERALS / NI3S2, options=fast)))
    pairs.append((f"{root / 'drop/bundle.tar.gz'}::{COASS_2}", bondcheck.check(MINERALS / COASS_2, options=fast)))
    pairs.append((f"{root / 'drop/bundle.tar.gz'}::Li2O2.json", bondcheck.check(PMG / "Li2O2.json", options=fast)))
    with ase.db.connect(root / "rows.db") as db:
        pairs.append((f"{root / 'rows.db'}::id=3", bondcheck.check(db.get(id=3).toatoms(), options=fast)))
    assert len(pairs) == 10
    for entry, ref in pairs:
        d = ref.to_dict()
        assert got[entry]["spacegroup"] == ""
        assert all(s["wyckoff"] is None for s in got[entry]["sites"])
        for k in keys:
            assert got[entry][k] == d[k], (entry, k)


def test_symmetry_on_request(tmp_path):
    """`scan --symmetry` gives the rows `bondcheck check` gives, with space
    groups and Wyckoff letters: zincblende SiC is F-43m with Si and C on 4a
    and 4c (COD 1010995, as bundled with ase), and the verdict is the one of
    the default scan."""
    from bondcheck.cli import main

    for f in (SIC, NI3S2, MOS2):
        shutil.copy(MINERALS / f, tmp_path / f)
    rows = {}
    for name, flags in (("symmetry", ["--symmetry"]), ("default", [])):
        out = tmp_path / f"{name}.jsonl"
        code = main(["scan", str(tmp_path), *flags, "--out", str(out), "--no-store", "--jobs", "1", "--no-progress"])
        assert code in (0, 1)
        rows[name] = {Path(r["path"]).name: r for r in read_rows(str(out))}
    sym, plain = rows["symmetry"], rows["default"]
    assert sym[SIC]["spacegroup"] == "F-43m (216)"
    assert sorted(s["wyckoff"] for s in sym[SIC]["sites"]) == ["a", "c"]
    for f in (SIC, NI3S2, MOS2):
        d = bondcheck.check(MINERALS / f).to_dict()
        for k in ("spacegroup", "verdict", "causes", "residual", "sites", "findings"):
            assert sym[f][k] == d[k], (f, k)
        assert plain[f]["verdict"] == sym[f]["verdict"]
        assert plain[f]["residual"] == sym[f]["residual"]


def test_known_chemistry_through_every_container(mixed, mixed_scan):
    """Counts that follow from well-known structural chemistry (common
    practice, no source): zincblende SiC and SiO2 have VEC_A = 8 and no
    anion-anion bonds; the peroxides K2O2 and Li2O2 have VEC_A = 7 and one
    O-O bond per oxygen; antifluorite Li2O has VEC_A = 8."""
    root, _ = mixed
    got = _by_entry(mixed_scan[1])
    for entry in (str(root / f"minerals/{SIC}"), f"{root / 'bundle.zip'}::set-a/{SIC}",
                  f"{root / 'rows.db'}::id=1"):
        r = got[entry]
        assert (r["formula"], r["verdict"], r["vec_anion"], r["aa_observed"]) == ("SiC", "consistent", 8.0, 0.0)
    for entry in (str(root / f"minerals/{QUARTZ}"), f"{root / 'rows.db'}::id=2"):
        assert (got[entry]["formula"], got[entry]["vec_anion"], got[entry]["aa_observed"]) == ("SiO2", 8.0, 0.0)
    for entry in (str(root / "json/K2O2.json"), f"{root / 'drop/bundle.tar.gz'}::Li2O2.json"):
        r = got[entry]
        assert (r["verdict"], r["vec_anion"], r["aa_observed"]) == ("consistent", 7.0, 1.0)
        assert r["anions"] == ["O"]
    assert got[str(root / "json/Li2O.json")]["vec_anion"] == 8.0
    # the POSCAR in the zip is MoS2 (COD 9007661), read through ase
    assert got[f"{root / 'bundle.zip'}::set-b/POSCAR"]["formula"] == "MoS2"
    assert got[f"{root / 'rows.db'}::id=3"]["name"] == MOS2[:-4]


def test_output_formats_agree(mixed_scan):
    tally, rows, files, store = mixed_scan
    ref = {r["path"]: r for r in rows}
    for path in files[1:] + [str(store)]:
        other = _by_entry(read_rows(path))
        assert set(other) == set(ref), path
        for k, r in other.items():
            for key in ("entry", "status", "verdict", "formula", "causes", "anions", "vec_anion", "residual"):
                assert r[key] == ref[k][key], (path, k, key)
            assert [f["slug"] for f in r["findings"]] == [f["slug"] for f in ref[k]["findings"]]
    sums = [summarize(p).to_dict() for p in files + [str(store)]]
    for s in sums[1:]:
        for key in ("entries", "structures", "status", "verdicts", "causes", "worth_a_look"):
            assert s[key] == sums[0][key], key
    assert sums[0]["status"] == dict(tally.status)
    assert sums[0]["verdicts"] == dict(tally.verdicts)


def test_rerun_takes_everything_from_the_store(mixed, mixed_scan, tmp_path):
    root, exp = mixed
    tally, rows, _, store = mixed_scan
    copy = tmp_path / "store.sqlite"
    shutil.copy(store, copy)
    sc = Scanner([str(root)], store=str(copy), jobs=2)
    again = list(sc.rows())
    failed_to_open = {str(root / "bad.zip"), str(root / "other.db"), f"{root / 'bundle.zip'}::set-b/inner.zip"}
    assert sc.checked == 0
    assert sc.reused == len(exp) - len(failed_to_open)
    assert sorted(map(json.dumps, again)) == sorted(map(json.dumps, rows))


def test_identical_content_is_checked_once(tmp_path):
    for d in ("a", "b", "c"):
        (tmp_path / d).mkdir()
        shutil.copy(MINERALS / MOS2, tmp_path / d / MOS2)
    sc = Scanner([str(tmp_path)], store=None, jobs=1)  # all three in flight at once
    rows = list(sc.rows())
    assert [r["entry"] for r in rows] == [str(tmp_path / d / MOS2) for d in "abc"]
    assert sc.checked == 1 and sc.copies == 2
    sc = Scanner([str(tmp_path)], store=str(tmp_path / "s.sqlite"), executor="inline")  # one after another
    assert [_strip(r) for r in sc.rows()] == [_strip(r) for r in rows]
    assert sc.checked == 1 and sc.reused == 2
    assert len({r["hash"] for r in rows}) == 1
    assert all(r["formula"] == "MoS2" for r in rows)


def test_a_row_per_data_block(tmp_path):
    """A CIF holding two data blocks (COD 1010995 and 9007661 one after the
    other) is one entry with a row per block."""
    two = tmp_path / "two-blocks.cif"
    two.write_bytes((MINERALS / SIC).read_bytes() + b"\n" + (MINERALS / MOS2).read_bytes())
    out = tmp_path / "r.jsonl"
    tally = scan([str(tmp_path)], out=[str(out)], store=str(tmp_path / "s.sqlite"), executor="inline", progress=False)
    rows = list(read_rows(str(out)))
    assert [(r["entry"], r["path"], r["formula"]) for r in rows] == [
        (str(two), f"{two}#1010995", "SiC"), (str(two), f"{two}#9007661", "MoS2")]
    assert tally.entries == 1 and tally.rows == 2
    again = list(Scanner([str(tmp_path)], store=str(tmp_path / "s.sqlite"), executor="inline").rows())
    assert [r["path"] for r in again] == [r["path"] for r in rows]


def test_limits_reach_the_workers(tmp_path):
    """--max-atoms holds in the worker processes: zincblende SiC (COD 1010995)
    has 8 atoms in its cubic cell, MoS2 (COD 9007661, 3R) has 9."""
    from bondcheck.cli import main

    for name in (SIC, MOS2):
        shutil.copy(MINERALS / name, tmp_path / name)
    out = tmp_path / "r.jsonl"
    code = main(["scan", str(tmp_path), "--max-atoms", "8", "--out", str(out), "--no-store", "--jobs", "1",
                 "--no-progress"])
    got = _by_entry(read_rows(str(out)))
    assert got[str(tmp_path / SIC)]["status"] == "ok"
    assert got[str(tmp_path / MOS2)]["status"] == "error"
    assert "9" in got[str(tmp_path / MOS2)]["error"] and "8" in got[str(tmp_path / MOS2)]["error"]
    assert code == 1


def test_globs_lists_and_missing_paths(tmp_path):
    for name in (SIC, MOS2, QUARTZ):
        shutil.copy(MINERALS / name, tmp_path / name)
    lst = tmp_path / "inputs.txt"
    lst.write_text(f"# batch LX-7\n{tmp_path / QUARTZ}\n\n{tmp_path / 'gone.cif'}\n")
    from bondcheck.cli import main

    out = tmp_path / "r.jsonl"
    code = main(["scan", str(tmp_path / "cod_10*.cif"), str(tmp_path / "nothing*.cif"), "--from-list", str(lst),
                 "--out", str(out), "--no-store", "--executor", "inline", "--no-progress"])
    got = _by_entry(read_rows(str(out)))
    assert set(got) == {str(tmp_path / SIC), str(tmp_path / QUARTZ), str(tmp_path / "gone.cif"),
                        str(tmp_path / "nothing*.cif")}
    assert got[str(tmp_path / "gone.cif")]["error"] == "no such file or directory"
    assert got[str(tmp_path / "nothing*.cif")]["error"] == "no files match this pattern"
    assert code == 1  # entries in error


def _slow_structure(path: Path, n: int = 16) -> None:
    """An n x n x n supercell of zincblende SiC (COD 1010995): 32768 atoms for
    n = 16, several seconds of work when the space group is searched (about
    10 s here, 0.3 s of it without the search; about 3 s for n = 13)."""
    import ase.io

    ase.io.write(path, ase.io.read(MINERALS / SIC).repeat((n, n, n)), format="extxyz")


# The timeout tests need an entry that is slow: the space-group search of a
# large supercell is.
SLOW = bondcheck.Options(symmetry=True)


def test_timeout_kills_the_worker_and_goes_on(tmp_path):
    col = tmp_path / "col"
    col.mkdir()
    _slow_structure(col / "a-huge.xyz")
    for name in (SIC, MOS2, QUARTZ):
        shutil.copy(MINERALS / name, col / name)
    store = tmp_path / "s.sqlite"
    t0 = time.perf_counter()
    tally = scan([str(col)], SLOW, out=[str(tmp_path / "r.jsonl")], store=str(store), jobs=1, timeout=2.5,
                 progress=False)
    took = time.perf_counter() - t0
    got = _by_entry(read_rows(str(tmp_path / "r.jsonl")))
    slow = got[str(col / "a-huge.xyz")]
    assert slow["status"] == "timeout"
    assert "2.5 s" in slow["error"]
    assert slow["entry_seconds"] >= 2.5
    for name in (SIC, MOS2, QUARTZ):
        assert got[str(col / name)]["status"] == "ok"
    assert got[str(col / SIC)]["vec_anion"] == 8.0
    assert tally.status == {"ok": 3, "timeout": 1}
    assert took < 30
    # the store remembers the timeout: the same limit does not try again
    sc = Scanner([str(col)], SLOW, store=str(store), jobs=1, timeout=2.5)
    assert len(list(sc.rows())) == 4 and sc.checked == 0


def _kill_a_busy_worker():
    """A thread that, as the out-of-memory killer might, kills the scan's
    worker once it has been busy for a second."""
    import threading

    import psutil

    me = psutil.Process()

    def kill_worker():
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:
            workers = [p for p in me.children(recursive=True)  # forked by the worker server
                       if p.ppid() != me.pid and "forkserver" in " ".join(p.cmdline())]
            if workers:
                time.sleep(1.0)  # let it get into the big structure
                for p in workers:
                    p.kill()
                return
            time.sleep(0.05)

    killer = threading.Thread(target=kill_worker)
    killer.start()
    return killer


def test_a_worker_killed_under_an_entry_costs_only_that_entry(tmp_path):
    """As when the out-of-memory killer takes a worker that checks one entry
    at a time (--chunk 1): the entry it was on gets an error row (not stored,
    so a rerun tries it again); the rest go on."""
    pytest.importorskip("psutil")
    col = tmp_path / "col"
    col.mkdir()
    _slow_structure(col / "a-huge.xyz")
    for name in (SIC, MOS2):
        shutil.copy(MINERALS / name, col / name)
    killer = _kill_a_busy_worker()
    store = tmp_path / "s.sqlite"
    sc = Scanner([str(col)], SLOW, store=str(store), jobs=1, chunk=1)
    got = _by_entry(sc.rows())
    killer.join()
    big = got[str(col / "a-huge.xyz")]
    assert big["status"] == "error" and "worker process stopped" in big["error"]
    assert got[str(col / SIC)]["status"] == got[str(col / MOS2)]["status"] == "ok"
    assert got[str(col / MOS2)]["formula"] == "MoS2"
    con = sqlite3.connect(store)
    stored = {r[0] for r in con.execute("SELECT entry FROM entries")}
    con.close()
    assert stored == {str(col / SIC), str(col / MOS2)}


def test_a_worker_killed_under_a_batch_loses_nothing(tmp_path):
    """A worker checks its chunk as one batch, so when it dies nobody knows
    which entry was to blame: every entry of the batch is checked again, one
    at a time. A one-off kill then costs no entry at all."""
    pytest.importorskip("psutil")
    col = tmp_path / "col"
    col.mkdir()
    _slow_structure(col / "a-huge.xyz", 13)
    for name in (SIC, MOS2):
        shutil.copy(MINERALS / name, col / name)
    killer = _kill_a_busy_worker()
    store = tmp_path / "s.sqlite"
    sc = Scanner([str(col)], SLOW, store=str(store), jobs=1)
    got = _by_entry(sc.rows())
    killer.join()
    assert {k: r["status"] for k, r in got.items()} == {str(col / n): "ok" for n in ("a-huge.xyz", SIC, MOS2)}
    assert got[str(col / "a-huge.xyz")]["spacegroup"] == "F-43m (216)"  # the supercell keeps zincblende's group
    con = sqlite3.connect(store)
    stored = {r[0] for r in con.execute("SELECT entry FROM entries")}
    con.close()
    assert stored == {str(col / n) for n in ("a-huge.xyz", SIC, MOS2)}


def _copies(col: Path, n: int) -> None:
    """n distinct files: real CIFs, each with its own trailing comment."""
    col.mkdir()
    srcs = [(MINERALS / m).read_bytes() for m in (SIC, MOS2, QUARTZ, COASS_1)]
    for i in range(n):
        (col / f"lx7-{i:04d}.cif").write_bytes(srcs[i % len(srcs)] + f"\n# lab copy {i}\n".encode())


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-c", "import sys; from bondcheck.cli import main; sys.exit(main())", *args]


def _store_count(path: Path) -> int:
    try:
        con = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=1)
        try:
            return con.execute("SELECT count(*) FROM results").fetchone()[0]
        finally:
            con.close()
    except sqlite3.Error:
        return 0


def test_workers_are_renewed_on_long_scans(tmp_path, monkeypatch):
    """A worker process is replaced after RENEW_AFTER entries (so what a
    long-lived process accumulates stays bounded); no entry is lost or
    checked twice on the way, and the rows are those of one-at-a-time checks."""
    import bondcheck.scan as scan_mod

    monkeypatch.setattr(scan_mod, "RENEW_AFTER", 5)
    spawned = []
    spawn = scan_mod._Processes._spawn

    def counting(self):
        w = spawn(self)
        spawned.append(w.proc.pid)
        return w

    monkeypatch.setattr(scan_mod._Processes, "_spawn", counting)
    col = tmp_path / "col"
    _copies(col, 36)
    got = _by_entry(Scanner([str(col)], store=None, jobs=2, chunk=2).rows())
    assert len(got) == 36 and all(r["status"] == "ok" for r in got.values())
    # two at the start, then a fresh one whenever a worker has done 5 or more
    # and answered what it had in hand (up to two chunks of 2): at least 4 in all
    assert len(set(spawned)) >= 4
    fast = bondcheck.Options(symmetry=False)
    for i in (0, 1, 2, 3, 35):  # SiC, MoS2, SiO2, CoAsS, CoAsS
        d = bondcheck.check(col / f"lx7-{i:04d}.cif", options=fast).to_dict()
        r = got[str(col / f"lx7-{i:04d}.cif")]
        assert (r["formula"], r["verdict"], r["residual"]) == (d["formula"], d["verdict"], d["residual"])


@pytest.fixture(scope="module")
def copies(tmp_path_factory):
    """Distinct real CIFs, enough for an uninterrupted scan to take a few
    seconds however fast checking gets, and the rows of such a scan."""
    col = tmp_path_factory.mktemp("copies") / "col"
    n = 160
    _copies(col, n)
    t0 = time.perf_counter()
    ref = _by_entry(Scanner([str(col)], store=None, jobs=2).rows())
    rate = n / (time.perf_counter() - t0)
    if rate * 4 > n:  # four seconds' worth: room for the machine to get faster meanwhile
        shutil.rmtree(col)
        n = int(rate * 4)
        _copies(col, n)
        ref = _by_entry(Scanner([str(col)], store=None, jobs=2).rows())
    assert len(ref) == n
    return col, ref


@pytest.mark.parametrize("how", [signal.SIGKILL, signal.SIGINT], ids=["kill-9", "ctrl-c"])
def test_resume_after_interruption(tmp_path, copies, how):
    col, ref = copies
    n = len(ref)
    first = max(20, n // 8)

    store, out = tmp_path / "s.sqlite", tmp_path / "r.jsonl"
    cmd = _cli("scan", str(col), "--store", str(store), "--out", str(out), "--jobs", "2", "--chunk", "2")
    env = dict(os.environ, CI="true")
    p = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    while _store_count(store) < first and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    assert p.poll() is None, "the scan ended before it could be interrupted"
    p.send_signal(how)
    p.wait(30)
    done_before = _store_count(store)
    assert first <= done_before < n
    if how == signal.SIGINT:
        assert p.returncode == 130
        assert b"resume" in p.stderr.read()
        partial = [json.loads(line) for line in out.read_text().splitlines()]
        assert len(partial) == len({r["path"] for r in partial}) >= done_before
    else:
        assert p.returncode == -signal.SIGKILL
    p.stderr.close()

    res = subprocess.run([*cmd, "--format", "json"], env=env, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    summary = json.loads(res.stdout)
    assert summary["reused"] >= done_before
    assert summary["reused"] + summary["checked"] == n
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    got = _by_entry(rows)  # fails on a duplicate
    assert set(got) == set(ref)
    for k in ref:
        assert _strip(got[k]) == _strip(ref[k])
    con = sqlite3.connect(store)
    assert con.execute("SELECT count(*) FROM results").fetchone()[0] == n
    assert con.execute("SELECT count(*) FROM entries").fetchone()[0] == n
    con.close()


def test_dask_cluster_gives_the_local_rows(mixed):
    distributed = pytest.importorskip("distributed")
    root, exp = mixed
    local = _by_entry(Scanner([str(root)], store=None, executor="inline").rows())
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        sc = Scanner([str(root)], store=None, executor="dask", client=client)
        remote = _by_entry(sc.rows())
    assert set(remote) == set(local) == set(exp)
    for k in local:
        assert _strip(remote[k]) == _strip(local[k]), k


def test_worth_a_look_order(mixed_scan):
    """The ranking rule on real rows: findings that point at a wrong structure
    first, then error-severity findings, failed entries, then warnings."""
    rows = [r for r in mixed_scan[1] if r["status"] == "ok"]
    failed = next(r for r in mixed_scan[1] if r["status"] == "error")
    base = dict(rows[0])

    def with_finding(slug, severity):
        r = dict(base)
        r["findings"] = list(base["findings"]) + [{"slug": slug, "severity": severity, "message": "m",
                                                   "sites": [], "evidence": {}}]
        return r

    ranked = sorted([with_finding("electron-excess", "warning"), failed, with_finding("possibly-missing-atoms", "warning"),
                     with_finding("some-error", "error"), with_finding("possibly-misassigned-element", "warning")],
                    key=lambda r: -worth_a_look(r)[0])
    assert [worth_a_look(r)[1].split(":")[0] for r in ranked] == [
        "possibly-misassigned-element", "possibly-missing-atoms", "some-error", "error", "electron-excess"]
    assert worth_a_look(base)[0] == 0 or any(f["severity"] != "info" for f in base["findings"])
    t = Tally(top=3)
    for r in ranked[::-1]:
        t.add(r)
    assert [d["reason"].split(":")[0] for d in t.looks] == [
        "possibly-misassigned-element", "possibly-missing-atoms", "some-error"]
    text = render_summary(t)
    assert "worth a look" in text and "does not prove a structure right" in text


def test_summary_command(mixed_scan, capsys):
    from bondcheck.cli import main

    _, rows, files, _ = mixed_scan
    assert main(["summary", files[2], "--format", "json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["entries"] == len(rows)
    assert d["status"]["error"] == sum(r["status"] == "error" for r in rows)
    assert d["worth_a_look"][0]["verdict"] in ("error", "mismatch", "consistent", "not-applicable")
    assert main(["summary", files[0]]) == 0
    text = capsys.readouterr().out
    assert "slowest entries" in text and "verdict" in text
    assert main(["summary", str(Path(files[0]).with_suffix(".missing"))]) == 2


@pytest.mark.parametrize("width", [80, 132])
def test_progress_line_fits_the_terminal(tmp_path, width):
    # The live line on a terminal of the usual 80 columns and a wide one, at
    # the end of a long scan: nothing cut short (rich puts an ellipsis in
    # place of the count, the rate or the time left when the line is too
    # long), the entries done of all, the rate, and the mismatch and error
    # counts.  The rows are those of a real scan (ase's bundled COD minerals,
    # pymatgen's bundled structures, of which the scans above count one a
    # mismatch, and one broken file), each taken 4000 times, as a collection
    # of 120,000 entries would count them.
    import io

    from rich.console import Console

    from bondcheck.scan import _Progress

    for f in sorted(MINERALS.glob("*.cif")) + sorted(PMG.glob("*.json")):
        shutil.copy(f, tmp_path / f.name)
    (tmp_path / "broken.cif").write_text("data_broken\n_cell_length_a 3\n")
    out = tmp_path / "rows.jsonl"
    scan([str(tmp_path)], out=[str(out)], store=None, executor="inline", progress=False)
    rows = list(read_rows(str(out)))
    tally = Tally()
    for _ in range(4000):
        for row in rows:
            tally.add(row)
    n = tally.entries
    assert n == 4000 * len(rows) and tally.status["error"] >= 4000 and tally.verdicts["mismatch"] >= 4000
    buf = io.StringIO()
    bar = _Progress([str(tmp_path)], console=Console(file=buf, width=width, force_terminal=True, color_system=None))
    bar.counter.join(10)
    bar._total = n  # (the background count saw the folder once)
    bar.close(tally)
    text = re.sub(r"\x1b\[[0-9;?]*[A-Za-z]", "", buf.getvalue())  # (the cursor's control sequences)
    last = [line for line in text.replace("\r", "\n").splitlines() if line.strip()][-1]
    assert "…" not in last and len(last.rstrip()) <= width
    assert f"{n}/{n}" in last and "/s" in last
    assert f"mismatch {tally.verdicts['mismatch']:,}" in last and f"error {tally.status['error']:,}" in last
    assert ("consistent" in last) == (width >= 110)
