"""Fuzzing: mutated real CIFs give a result or an error row with a reason, never an exception.

Seeds are ase's bundled COD mineral CIFs (ase/test/testdata/minerals) and
pymatgen's bundled structures (pymatgen/util/structures) written with
CifWriter; tests/fuzz_inputs.py mutates them at the byte, token and structure
level.  Hypothesis draws the seed and the mutations, derandomized and with a
fixed number of examples, so that CI runs the same inputs every time.  The
longer campaign is tools/fuzz_campaign.py.
"""
from __future__ import annotations

import json
import re
import subprocess
import sys
import time
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from bondcheck.api import check_all
from bondcheck.read import read_cif_bytes
from bondcheck.record import StructureError
from bondcheck.render.json import to_json
from bondcheck.render.text import render

from .fuzz_inputs import make, mutate, seeds

ROOT = Path(__file__).resolve().parents[1]
NAMES = sorted(seeds())
# A reason that names a Python exception is a bug caught by a last guard.
CRASH = re.compile(r"unexpected \w+|\((?:[A-Z]\w*Error|[A-Z]\w*Exception|KeyError|StopIteration)\b")
# Generous: the slowest input seen in the campaign took 11 s on a busy machine.
BOUND = 30.0

SETTINGS = dict(deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])


def assert_one_line_reason(msg: str | None) -> None:
    assert msg, "an error row without a reason"
    assert "\n" not in msg and len(msg) < 300, msg
    assert not CRASH.search(msg), msg


def assert_handled(path: Path, rows, seconds: float) -> None:
    assert rows, "no row for the input"
    for r in rows:
        assert r.path == str(path) or r.path.startswith(f"{path}#"), r.path
        assert r.status in ("ok", "error"), r.status
        if r.status == "error":
            assert_one_line_reason(r.error)
            assert r.verdict is None
        else:
            assert r.verdict in ("consistent", "mismatch", "not-applicable"), r.verdict
    render(rows)
    assert len(json.loads(to_json(rows))) == len(rows)
    assert seconds < BOUND, f"{seconds:.1f} s"


def test_seeds_are_the_shipped_files():
    # 8 COD minerals shipped with ase, 21 structures shipped with pymatgen
    assert len(NAMES) == 29
    assert {n for n in NAMES if n.startswith("cod_")} >= {"cod_1010930.cif", "cod_1010995.cif"}
    for name in ("cod_1010930.cif", "SrTiO3.cif"):
        assert len(read_cif_bytes(seeds()[name], name)) == 1


def test_mutations_are_reproducible():
    assert make("SrTiO3.cif", 7) == make("SrTiO3.cif", 7)
    assert len({make("SrTiO3.cif", k) for k in range(20)}) > 15


@settings(max_examples=150, **SETTINGS)
@given(name=st.sampled_from(NAMES), rnd=st.randoms(use_true_random=False))
def test_mutated_cifs_through_check_all(tmp_path_factory, name, rnd):
    data = mutate(seeds()[name], rnd)
    path = tmp_path_factory.mktemp("fuzz") / name
    path.write_bytes(data)
    t0 = time.perf_counter()
    rows = check_all([path])
    assert_handled(path, rows, time.perf_counter() - t0)


@settings(max_examples=400, **SETTINGS)
@given(name=st.sampled_from(NAMES), rnd=st.randoms(use_true_random=False),
       rounds=st.integers(1, 6))
def test_mutated_cifs_through_the_reader(name, rnd, rounds):
    data = mutate(seeds()[name], rnd, rounds)
    try:
        crystals = read_cif_bytes(data, name)
    except StructureError as exc:
        assert_one_line_reason(str(exc))
        return
    for c in crystals:
        assert c.natoms > 0 and c.frac.shape == (c.natoms, 3)
        assert (c.frac >= 0).all() and (c.frac < 1).all()
        assert (c.occupancy > 0).all() and (c.occupancy <= 1).all()


@settings(max_examples=150, **SETTINGS)
@given(st.binary(max_size=2000))
def test_random_bytes_named_cif(tmp_path_factory, data):
    path = tmp_path_factory.mktemp("bytes") / "random.cif"
    path.write_bytes(data)
    t0 = time.perf_counter()
    rows = check_all([path])
    assert_handled(path, rows, time.perf_counter() - t0)
    assert len(rows) == 1 or all(r.path.startswith(f"{path}#") for r in rows)


# inputs of the campaign that once went wrong, and a spread of others
CLI_INPUTS = [("SrTiO3.cif", 782), ("Li10GeP2S12.cif", 3), ("cod_9004112.cif", 5), ("LiFePO4.cif", 11),
              ("cod_1010930.cif", 2), ("Si.cif", 8), ("TlBiSe2.cif", 30), ("cod_9017338.cif", 23)]


def test_mutated_cifs_through_the_command_line(tmp_path):
    paths = []
    for name, k in CLI_INPUTS:
        p = tmp_path / f"{k}-{name}"
        p.write_bytes(make(name, k))
        paths.append(p)
    out = subprocess.run([sys.executable, "-m", "bondcheck.cli", "check", *map(str, paths), "--format", "json"],
                         capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert out.returncode in (0, 1, 2), out.stderr
    assert "Traceback" not in out.stderr
    rows = json.loads(out.stdout)
    for p in paths:
        mine = [r for r in rows if r["path"] == str(p) or r["path"].startswith(f"{p}#")]
        assert mine, p.name
        for r in mine:
            assert r["status"] in ("ok", "error")
            if r["status"] == "error":
                assert_one_line_reason(r["error"])
    text = subprocess.run([sys.executable, "-m", "bondcheck.cli", "check", *map(str, paths)],
                          capture_output=True, text=True, cwd=ROOT, timeout=600)
    assert text.returncode == out.returncode and "Traceback" not in text.stderr


@pytest.mark.parametrize("name, k", CLI_INPUTS[:1])
def test_campaign_finding_vanishing_occupancy(tmp_path, name, k):
    # SrTiO3 input 782 wrote an occupancy of 1e-320: the implied oxidation
    # state of Ti came out infinite and the JSON output failed
    data = make(name, k)
    assert b"1e-320" in data
    path = tmp_path / name
    path.write_bytes(data)
    rows = check_all([path])
    assert all(r.status == "error" and "too small to be meant" in r.error for r in rows)
