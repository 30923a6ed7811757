"""Throughput of bondcheck.read on the shared corpus of relaxed structures.

    python benchmarks/bench_read.py [--corpus DIR] [--limit N] [--repeat R]

Reads every CIF under ../shared/corpus/mp-relaxed (relative to the project
root) through bondcheck.read.read() and prints files per second, next to a
gemmi-only baseline doing the least gemmi work that yields the same atoms
(parse the file, build gemmi's small structure, expand it to the unit cell).
The best of R passes is reported, so that the page cache is warm and noise
from other processes counts less; CPU time is printed beside wall time because
on a busy machine the wall time also counts other processes.  Files a reader
refuses (bondcheck's StructureError, gemmi's errors) are timed like the rest
and counted in the line printed.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import gemmi  # noqa: E402

from bondcheck.read import read  # noqa: E402


def bench(label: str, fn, files: list[Path], repeat: int) -> float:
    best_wall = best_cpu = float("inf")
    atoms = failed = 0
    for _ in range(repeat):
        atoms = failed = 0
        t0, c0 = time.perf_counter(), time.process_time()
        for f in files:
            # A file this reader refuses counts as read, and is reported (bondcheck's
            # StructureError is a ValueError; gemmi raises RuntimeError or ValueError);
            # any other exception is a fault of the reader and ends the run.
            try:
                atoms += fn(f)
            except (RuntimeError, ValueError):
                failed += 1
        best_wall = min(best_wall, time.perf_counter() - t0)
        best_cpu = min(best_cpu, time.process_time() - c0)
    rate = len(files) / best_wall
    print(f"{label:30s} {rate:8.0f} files/s  {1e6 * best_wall / len(files):6.1f} us/file wall, "
          f"{1e6 * best_cpu / len(files):6.1f} us/file CPU  ({atoms} atoms, {failed} files refused)")
    return rate


def with_bondcheck(path: Path) -> int:
    return sum(c.natoms for c in read(path))


def with_gemmi(path: Path) -> int:
    doc = gemmi.cif.read_file(str(path))
    small = gemmi.make_small_structure_from_block(doc.sole_block())
    return len(small.get_all_unit_cell_sites())


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--corpus", type=Path,
                        default=ROOT / ".." / "shared" / "corpus" / "mp-relaxed")
    parser.add_argument("--limit", type=int, default=0, help="read only the first N files")
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    if not args.corpus.is_dir():
        print(f"corpus not found: {args.corpus} (the shared corpus is not part of a clone)")
        return 1
    files = sorted(args.corpus.rglob("*.cif"))
    if args.limit:
        files = files[: args.limit]
    if not files:
        print(f"no CIF files under {args.corpus}")
        return 1
    print(f"{len(files)} CIF files under {args.corpus.resolve()}")
    ours = bench("bondcheck.read.read", with_bondcheck, files, args.repeat)
    base = bench("gemmi only (parse + expand)", with_gemmi, files, args.repeat)
    print(f"bondcheck runs at {ours / base:.2f} x the gemmi-only rate")
    return 0


if __name__ == "__main__":
    sys.exit(main())
