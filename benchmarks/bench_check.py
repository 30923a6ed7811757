"""Files per second of the per-structure path, in one process (one core).

    python benchmarks/bench_check.py                  # all of mp-relaxed, both modes
    python benchmarks/bench_check.py --limit 1000 --mode fast

For each file of ../shared/corpus/mp-relaxed (P1 DFT cells, about 12 atoms on
average): read it (gemmi) and run bondcheck.api.check_crystal on every
structure it holds, with the default symmetry search (spglib) and with
Options(symmetry=False). Prints files/s from wall-clock time and from the
process's CPU time (the CPU figure is the one to compare on a busy machine),
and the time per file spent in each stage: read, validate, bonds (neighbour
list and criterion), sites (spglib or grouping by environment), count,
per-atom values (the atoms grouped per site and element, the values per
group, the fragile sites), diagnose (which counts variants of the structure again),
result rows (formula, site rows) and the rest of check_crystal.

Skips with a message when the corpus is absent.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"

# Stage functions as check_crystal calls them from bondcheck.api.
STAGES = {
    "validate": ("_validate",),
    "bonds": ("find_contacts",),
    "sites": ("find_sites", "group_sites"),
    "count": ("count",),
    "per_atom": ("_site_groups", "per_atom", "_fragile_sites"),
    "diagnose": ("diagnose",),
    "rows": ("formula_of", "_site_rows"),
}


class Clock:
    """Wraps the stage functions in bondcheck.api with CPU-time counters."""

    def __init__(self):
        import bondcheck.api as api

        self.api = api
        self.spent = {k: 0.0 for k in STAGES}
        self.saved = {}
        for stage, names in STAGES.items():
            for name in names:
                fn = getattr(api, name)
                self.saved[name] = fn
                setattr(api, name, self._wrap(stage, fn))

    def _wrap(self, stage, fn):
        spent = self.spent
        clock = time.process_time

        def timed(*args, **kwargs):
            t = clock()
            try:
                return fn(*args, **kwargs)
            finally:
                spent[stage] += clock() - t

        return timed

    def restore(self):
        for name, fn in self.saved.items():
            setattr(self.api, name, fn)


def run(files, symmetry: bool, stages: bool) -> dict:
    from bondcheck.api import Options, check_crystal
    from bondcheck.read import read
    from bondcheck.record import StructureError

    opts = Options(symmetry=symmetry)
    clock = Clock() if stages else None
    t_read = 0.0
    n_struct = n_err = 0
    cpu0, wall0 = time.process_time(), time.perf_counter()
    for f in files:
        t = time.process_time()
        try:
            crystals = read(str(f))
        except StructureError:
            n_err += 1
            t_read += time.process_time() - t
            continue
        t_read += time.process_time() - t
        for cr in crystals:
            r = check_crystal(cr, opts)
            n_struct += 1
            n_err += r.status != "ok"
    cpu, wall = time.process_time() - cpu0, time.perf_counter() - wall0
    out = {"files": len(files), "structures": n_struct, "errors": n_err, "cpu": cpu, "wall": wall, "read": t_read}
    if clock is not None:
        clock.restore()
        out["stages"] = dict(clock.spent)
    return out


def report(name: str, r: dict) -> None:
    n = r["files"]
    print(f"{name}: {n} files, {r['structures']} structures, {r['errors']} errors")
    print(f"  {n / r['wall']:8.0f} files/s wall   {n / r['cpu']:8.0f} files/s CPU")
    if "stages" in r:
        parts = {"read": r["read"], **r["stages"]}
        parts["other"] = r["cpu"] - sum(parts.values())
        for k, v in parts.items():
            print(f"  {k:10s} {v / n * 1e3:7.3f} ms/file  {100 * v / r['cpu']:5.1f} %")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--limit", type=int, default=0, help="first N files (sorted by name); 0 = all")
    ap.add_argument("--mode", choices=("spglib", "fast", "both"), default="both")
    ap.add_argument("--no-stages", action="store_true", help="no per-stage timers (a little less overhead)")
    args = ap.parse_args(argv)
    folder = CORPUS / "mp-relaxed"
    if not folder.is_dir():
        print(f"skipped: {folder} is absent")
        return 0
    files = sorted(folder.glob("*.cif"))
    if args.limit:
        files = files[: args.limit]
    import bondcheck.api  # noqa: F401  (imports and caches outside the timing)
    from bondcheck.read import read

    for f in files[:20]:  # warm caches (element tables, vesin, spglib)
        for cr in read(str(f)):
            bondcheck.api.check_crystal(cr, bondcheck.api.Options(symmetry=False))
            bondcheck.api.check_crystal(cr)
    t = time.process_time()
    for f in files:
        read(str(f))
    t_read = time.process_time() - t
    print(f"read alone: {len(files) / t_read:.0f} files/s CPU")
    modes = {"spglib": [True], "fast": [False], "both": [True, False]}[args.mode]
    for sym in modes:
        name = "symmetry search (spglib)" if sym else "Options(symmetry=False)"
        report(name, run(files, sym, not args.no_stages))
    return 0


if __name__ == "__main__":
    sys.exit(main())
