"""CPU time per file of each stage as a scan worker runs them: 32 files read,
then each stage over all their structures before the next stage
(bondcheck.api.check_crystals does the same), with the scan's default
Options(symmetry=False).

    python benchmarks/bench_stages.py              # first 3000 files of mp-relaxed
    python benchmarks/bench_stages.py --limit 1000

Prints ms per file for read, bonds (validation, neighbour list, criterion),
sites (grouping by environment), count, per-atom values (grouped per site
and element, and the fragile sites), diagnose (which counts variants of the
structure again) and result rows, then the whole of
check_crystals plus Result.to_dict for comparison.  The run is made twice and
the second is reported (the first warms caches and imports).  Skips with a
message when the corpus is absent.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"
STAGES = ("read", "bonds", "sites", "count", "per_atom", "diagnose", "rows")


def read_chunk(files) -> list:
    """The structures of the files that can be read."""
    from bondcheck.read import read
    from bondcheck.record import StructureError

    cs = []
    for f in files:
        try:
            cs.extend(read(f))
        except StructureError:
            pass
    return cs


def run(files, opts, spent) -> None:
    from bondcheck import api

    clk = time.process_time
    for start in range(0, len(files), 32):
        t = clk()
        cs = read_chunk(files[start:start + 32])
        spent["read"] += clk() - t
        t = clk()
        con = [api._bonds_stage(c, opts) for c in cs]
        spent["bonds"] += clk() - t
        t = clk()
        si = [api._sites_stage(c, k, opts) for c, k in zip(cs, con)]
        spent["sites"] += clk() - t
        t = clk()
        cn = [api.count(c, k, s, opts.anions, opts.valence) for c, k, s in zip(cs, con, si)]
        spent["count"] += clk() - t
        t = clk()
        gr = [api._site_groups(c, s) for c, s in zip(cs, si)]
        pa = [api.per_atom(k, c.natoms, c.occupancy, g[1], g[3]) for c, k, g in zip(cs, con, gr)]
        fl = [api._fragile_sites(c, k, s, n) for c, k, s, n in zip(cs, con, si, cn)]
        spent["per_atom"] += clk() - t
        t = clk()
        for c, k, s, n, f in zip(cs, con, si, cn, fl):
            api.diagnose(c, k, s, n, f, opts.anions, opts.valence, opts.criterion)
        spent["diagnose"] += clk() - t
        t = clk()
        for c, s, n, g, p in zip(cs, si, cn, gr, pa):
            api.formula_of(c)
            api._site_rows(c, s, n, g, p)
        spent["rows"] += clk() - t


def whole(files, opts) -> float:
    from bondcheck.api import check_crystals

    t0 = time.process_time()
    for s in range(0, len(files), 32):
        for r in check_crystals(read_chunk(files[s:s + 32]), opts):
            r.to_dict()
    return time.process_time() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--limit", type=int, default=3000, help="first N files of mp-relaxed (sorted by name); 0 = all")
    args = ap.parse_args(argv)
    folder = CORPUS / "mp-relaxed"
    if not folder.is_dir():
        print(f"skipped: {folder} is absent", file=sys.stderr)
        return 0
    from bondcheck.api import Options

    files = sorted(str(p) for p in folder.glob("*.cif"))
    if args.limit:
        files = files[: args.limit]
    opts = Options(symmetry=False)
    for _ in range(2):
        spent = dict.fromkeys(STAGES, 0.0)
        run(files, opts, spent)
    n = len(files)
    total = sum(spent.values())
    for k, v in spent.items():
        print(f"{k:9s} {v / n * 1e3:6.3f} ms/file  {100 * v / total:5.1f} %")
    print(f"sum       {total / n * 1e3:6.3f} ms/file  {n / total:6.0f} files/s")
    w = whole(files, opts)
    print(f"check_crystals + to_dict: {w / n * 1e3:6.3f} ms/file  {n / w:6.0f} files/s (CPU, reading included)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
