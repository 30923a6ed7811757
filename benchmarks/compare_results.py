"""Guard for speed work: run check_all over a fixed set of corpus files and
compare the JSON results with a saved run.

    python benchmarks/compare_results.py save /tmp/bc_baseline.json
    python benchmarks/compare_results.py compare /tmp/bc_baseline.json
    python benchmarks/compare_results.py compare /tmp/bc_baseline.json --count-only
    python benchmarks/compare_results.py compare /tmp/bc_baseline.json --fast
    python benchmarks/compare_results.py save /tmp/bc_scan.json --no-symmetry
    python benchmarks/compare_results.py compare /tmp/bc_scan.json --no-symmetry

The file set is the first 1500 files of ../shared/corpus/mp-relaxed (sorted by
name) plus all of ../shared/corpus/prototypes.  Reading can be frozen
(--frozen PICKLE: the crystal records are read once and pickled, later runs
check the pickled records) so that concurrent changes to the reader do not
show up as differences.

Results must be identical apart from 'seconds'; floats may differ by less than
1e-9.  --count-only compares only the count fields (verdict, anions, VEC, AA,
CC, residual and the per-site count values), for when findings change for
other reasons.  --fast runs the candidate with Options(symmetry=False) and
compares the count fields, ignoring Wyckoff letters, multiplicities and the
space group (which that mode does not determine); sites of equal environment
that the fast mode merges are compared by their distinct rows.  --no-symmetry
saves and compares with Options(symmetry=False), the scan's default, on every
field: the guard for speed work on that path.
"""
from __future__ import annotations

import argparse
import json
import math
import pickle
import sys
import time
from pathlib import Path

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"

COUNT_KEYS = ("verdict", "anions", "cations", "vec_anion", "aa_predicted", "aa_observed", "cc_observed", "residual")
SITE_COUNT_KEYS = (
    "bonds", "coordination", "formal_charge", "nearest", "last_bonded", "first_unbonded",
    "multiplicity", "wyckoff", "element", "role", "occupancy",
)


def file_set() -> list[Path]:
    mp = sorted((CORPUS / "mp-relaxed").glob("*.cif"))[:1500]
    proto = sorted((CORPUS / "prototypes").glob("*.cif"))
    return mp + proto


def _inputs(frozen: str | None):
    files = file_set()
    if frozen is None:
        return [str(f) for f in files]
    p = Path(frozen)
    if p.exists():
        with p.open("rb") as fh:
            return pickle.load(fh)
    from bondcheck.read import read
    from bondcheck.record import StructureError

    items = []
    for f in files:
        try:
            items.extend(read(str(f)))
        except StructureError:
            items.append(str(f))  # unreadable: check_all reports the error
    with p.open("wb") as fh:
        pickle.dump(items, fh)
    return items


def run(frozen: str | None, fast: bool = False) -> list[dict]:
    from bondcheck.api import Options, check_all

    items = _inputs(frozen)
    opts = Options(symmetry=False) if fast else Options()
    out = []
    t0 = time.perf_counter()
    for item in items:
        for r in check_all([item], options=opts):
            d = r.to_dict()
            d.pop("seconds", None)
            out.append(d)
    dt = time.perf_counter() - t0
    print(f"{len(out)} results in {dt:.2f} s ({len(out) / dt:.0f} /s)", file=sys.stderr)
    return out


def _same(a, b, path, diffs, tol=1e-9):
    if isinstance(a, float) and isinstance(b, float):
        if math.isnan(a) and math.isnan(b):
            return
        if abs(a - b) >= tol:
            diffs.append(f"{path}: {a!r} != {b!r}")
        return
    if isinstance(a, dict) and isinstance(b, dict):
        for k in sorted(set(a) | set(b)):
            if k not in a or k not in b:
                diffs.append(f"{path}.{k}: present in only one")
            else:
                _same(a[k], b[k], f"{path}.{k}", diffs, tol)
        return
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            diffs.append(f"{path}: length {len(a)} != {len(b)}")
            return
        for k, (x, y) in enumerate(zip(a, b)):
            _same(x, y, f"{path}[{k}]", diffs, tol)
        return
    if a != b:
        diffs.append(f"{path}: {a!r} != {b!r}")


def _count_view(d: dict, fast: bool) -> dict:
    site_keys = SITE_COUNT_KEYS
    if fast:
        site_keys = tuple(k for k in site_keys if k not in ("multiplicity", "wyckoff"))
    out = {k: d.get(k) for k in ("path", "status", "error") + COUNT_KEYS}
    rows = [json.dumps({k: s.get(k) for k in site_keys}, sort_keys=True) for s in d.get("sites") or []]
    # Without a symmetry search, sites with equal environments may be one
    # site: compare the distinct rows (the site count is reported apart).
    out["sites"] = sorted(set(rows)) if fast else sorted(rows)
    if not fast:
        out["site_order"] = [s.get("label") for s in d.get("sites") or []]
    return out


def compare(old: list[dict], new: list[dict], count_only: bool, fast: bool) -> list[str]:
    diffs: list[str] = []
    if len(old) != len(new):
        diffs.append(f"number of results {len(old)} != {len(new)}")
    if fast:
        merged = sum(len(a.get("sites") or []) != len(b.get("sites") or []) for a, b in zip(old, new))
        print(f"{merged} structures with fewer site rows (sites of equal environment merged)", file=sys.stderr)
    for a, b in zip(old, new):
        if count_only or fast:
            a, b = _count_view(a, fast), _count_view(b, fast)
        _same(a, b, a.get("path", "?"), diffs)
    return diffs


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("action", choices=("save", "compare"))
    ap.add_argument("baseline", help="JSON file of saved results")
    ap.add_argument("--frozen", help="pickle of read crystal records (written on first use)")
    ap.add_argument("--count-only", action="store_true", help="compare only the count fields")
    ap.add_argument("--fast", action="store_true", help="check with Options(symmetry=False)")
    ap.add_argument("--no-symmetry", action="store_true",
                    help="save and compare with Options(symmetry=False), every field")
    ap.add_argument("--show", type=int, default=20, help="differences to print")
    args = ap.parse_args(argv)
    if not CORPUS.is_dir():
        print(f"skipped: {CORPUS} is absent", file=sys.stderr)
        return 0
    results = json.loads(json.dumps(run(args.frozen, fast=args.fast or args.no_symmetry)))
    if args.action == "save":
        Path(args.baseline).write_text(json.dumps(results))
        print(f"saved {len(results)} results to {args.baseline}")
        return 0
    old = json.loads(Path(args.baseline).read_text())
    diffs = compare(old, results, args.count_only, args.fast)
    for line in diffs[: args.show]:
        print(line)
    # a difference reads 'PATH.cif.FIELD...: old != new' (every file of the set is a CIF)
    n_entries = len({line.split(".cif", 1)[0] for line in diffs})
    print(f"{len(diffs)} differences in {n_entries} files over {len(results)} results")
    return 1 if diffs else 0


if __name__ == "__main__":
    sys.exit(main())
