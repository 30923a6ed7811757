"""Throughput of `bondcheck scan` on the shared corpus, against a plain
pymatgen script doing the naive version of the job on the same files.

    python benchmarks/bench_scan.py                    # 1000 corpus files
    python benchmarks/bench_scan.py --limit 0          # every corpus file
    python benchmarks/bench_scan.py --flat 100000      # + memory on 100,000 entries
    python benchmarks/bench_scan.py --only-flat --machinery 60000   # the scan's own ceiling
    python benchmarks/bench_scan.py --paired 5 --limit 600   # CPU per file against the script, interleaved

Each measurement runs in a fresh process (so imports, caches and memory do not
leak between them) and reports files/s and the peak resident memory of the
scan's processes (main, server and workers, sampled with psutil every 0.1 s).

Measurements
  loop      read() + check_crystal() in a plain loop with the scan's default
            settings (sites grouped by environment): the per-structure cost
  loop+symmetry   the same with Options(symmetry=True) (scan --symmetry)
  batched   the files read and checked 32 at a time, stage by stage
            (check_crystals), as a scan worker does
  inline    the scan machinery in one process (enumerate, read bytes, hash,
            check, write rows): inline - loop is the scan overhead per entry
  jobs=1    one worker process; jobs=2: two worker processes
  jobs=1 warm, jobs=2 warm   the same after a scan of two files in the same
            process: the worker server (which imports and warms up the
            pipeline, about 0.25 s, once per process) is already running,
            as in a long scan where that start is spread over many entries
  store     jobs=2 writing a fresh results store; rerun: the same again, all
            answered from the store
  pymatgen  the naive script: CifParser, covalent-radius cutoff (sum of
            covalent radii + 15 %), the most electronegative element as the
            anion, count anion-anion bonds per anion

--paired R   only `batched` and `pymatgen`, R rounds each in fresh processes,
            alternating which goes first (A B, B A, ...), on the same files: the
            ratio of CPU time per file in each round and its median.  On a
            machine whose speed drifts during a run (seen: the same loop 15 %
            apart in one process a minute later) this ratio is steadier than
            files/s taken minutes apart.  It also reads the per-core target
            against the script: 2000 files/s per core where the script does
            about 150 files/s is 13.3 times the script's rate.

Skips (exit status 0, with a message) when ../shared/corpus is absent.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"
HERE = Path(__file__).resolve()


# --------------------------------------------------------------------------
# memory sampling


class PeakMemory:
    """Peak RSS of this process and of all its descendants, sampled."""

    def __init__(self, every: float = 0.1):
        import psutil

        self.proc = psutil.Process()
        self.every = every
        self.peak_self = 0
        self.peak_total = 0
        self._stop = threading.Event()
        self._t = threading.Thread(target=self._run, daemon=True)
        self._t.start()

    def sample(self) -> None:
        import psutil

        try:
            me = self.proc.memory_info().rss
            total = me
            for c in self.proc.children(recursive=True):
                try:
                    total += c.memory_info().rss
                except psutil.Error:
                    pass
        except psutil.Error:
            return
        self.peak_self = max(self.peak_self, me)
        self.peak_total = max(self.peak_total, total)

    def _run(self) -> None:
        while not self._stop.wait(self.every):
            self.sample()

    def stop(self) -> dict:
        self._stop.set()
        self._t.join()
        self.sample()
        return {"peak_rss_main_mb": round(self.peak_self / 2**20, 1),
                "peak_rss_all_mb": round(self.peak_total / 2**20, 1)}


# --------------------------------------------------------------------------
# one measurement (in its own process)


def naive_pymatgen(files: list[str]) -> tuple[int, int]:
    """The plain script a curator might write: returns (structures, errors)."""
    import warnings

    from pymatgen.analysis.molecule_structure_comparator import CovalentRadius
    from pymatgen.io.cif import CifParser

    warnings.simplefilter("ignore")
    radius = CovalentRadius.radius
    done = errors = 0
    for f in files:
        try:
            s = CifParser(f).parse_structures(primitive=False)[0]
            els = [sp.symbol for sp in s.composition.elements]
            anion = max(els, key=lambda e: (s.composition.elements[els.index(e)].X, e))
            rmax = 2 * max(radius.get(e, 1.5) for e in els) * 1.15
            aa = 0
            n_anion = 0
            for i, nbrs in enumerate(s.get_all_neighbors(rmax)):
                ei = s[i].specie.symbol
                if ei != anion:
                    continue
                n_anion += 1
                for nb in nbrs:
                    ej = nb.specie.symbol
                    if ej == anion and nb.nn_distance <= 1.15 * (radius.get(ei, 1.5) + radius.get(ej, 1.5)):
                        aa += 1
            _ = aa / max(n_anion, 1)
            done += 1
        except Exception:
            errors += 1
    return done, errors


def batched(files: list[str], size: int = 32) -> tuple[int, int]:
    from bondcheck.api import Options, check_crystals
    from bondcheck.read import read
    from bondcheck.record import StructureError

    opts = Options(symmetry=False)
    done = errors = 0
    for s in range(0, len(files), size):
        crystals = []
        for f in files[s:s + size]:
            try:
                crystals += read(f)
            except StructureError:
                errors += 1
        done += len(check_crystals(crystals, opts))
    return done, errors


def loop(files: list[str], symmetry: bool = False) -> tuple[int, int]:
    from bondcheck.api import Options, check_crystal
    from bondcheck.read import read
    from bondcheck.record import StructureError

    opts = Options(symmetry=symmetry)
    done = errors = 0
    for f in files:
        try:
            for c in read(f):
                check_crystal(c, opts)
                done += 1
        except StructureError:
            errors += 1
    return done, errors


def one(name: str, files: list[str], workdir: str) -> dict:
    # imports first, so that the clocks see only the work
    import bondcheck.api  # noqa: F401
    import bondcheck.read  # noqa: F401
    import bondcheck.scan  # noqa: F401
    if name == "pymatgen":
        import pymatgen.io.cif  # noqa: F401

    label = name
    mem = PeakMemory()
    load0 = os.getloadavg()[0]
    cpu0 = time.process_time()
    t0 = time.perf_counter()
    extra: dict = {}
    if name.startswith("loop"):
        done, errors = loop(files, symmetry=name == "loop+symmetry")
    elif name == "batched":
        done, errors = batched(files)
    elif name == "pymatgen":
        done, errors = naive_pymatgen(files)
    else:
        from bondcheck.scan import scan

        lst = os.path.join(workdir, "files.txt")
        store = None
        warm, name = name.endswith(" warm"), name.removesuffix(" warm")
        jobs = {"inline": 1, "jobs=1": 1}.get(name, 2)
        executor = "inline" if name == "inline" else "process"
        if warm:  # start the worker server first, off the clock
            scan(files[:2], out=[os.path.join(workdir, "warm.jsonl")], store=None, jobs=jobs, progress=False)
            cpu0 = time.process_time()
            t0 = time.perf_counter()
        if name in ("store", "rerun"):
            store = os.path.join(workdir, "store.sqlite")
        from bondcheck.sources import read_list

        out = [os.path.join(workdir, f"{name}.jsonl")]
        tally = scan(list(read_list(lst)), out=out, store=store, jobs=jobs, executor=executor, progress=False)
        done, errors = tally.rows, tally.status.get("error", 0) + tally.status.get("timeout", 0)
        extra = {"checked": tally.checked, "reused": tally.reused,
                 "worker_ms_per_file": round(1000 * tally.check_seconds / len(files), 3)}
    wall = time.perf_counter() - t0
    cpu = time.process_time() - cpu0
    res = {"name": label, "files": len(files), "structures": done, "errors": errors,
           "wall_s": round(wall, 3), "files_per_s": round(len(files) / wall, 1),
           "main_cpu_ms_per_file": round(1000 * cpu / len(files), 3), "load_before": round(load0, 2),
           "load_after": round(os.getloadavg()[0], 2), **extra}
    res.update(mem.stop())
    return res


def flat(n: int, files: list[str], workdir: str) -> dict:
    """Scan a tar.gz of n distinct entries (corpus files with a numbered
    comment appended), sampling the main process's memory along the way."""
    import io
    import tarfile

    import psutil

    from bondcheck.scan import Scanner

    tpath = os.path.join(workdir, "many.tar.gz")
    datas = [Path(f).read_bytes() for f in files]
    with tarfile.open(tpath, "w:gz", compresslevel=1) as tf:
        for i in range(n):
            data = datas[i % len(datas)] + f"\n# copy {i}\n".encode()
            info = tarfile.TarInfo(f"lot-{i // 1000:03d}/entry-{i:06d}.cif")
            info.size = len(data)
            tf.addfile(info, io.BytesIO(data))
    proc = psutil.Process()
    mem = PeakMemory(every=0.5)
    samples = []
    t0 = time.perf_counter()
    sc = Scanner([tpath], store=os.path.join(workdir, "flat.sqlite"), jobs=2)
    k = 0
    for _ in sc.rows():
        k += 1
        if k % max(1, n // 10) == 0:
            samples.append((k, round(proc.memory_info().rss / 2**20, 1)))
    wall = time.perf_counter() - t0
    return {"name": f"flat {n}", "entries": sc.entries, "wall_s": round(wall, 1),
            "files_per_s": round(sc.entries / wall, 1), "main_rss_mb_at": samples, **mem.stop()}


def machinery(n: int, workdir: str, store: bool) -> dict:
    """The scan's own ceiling: n entries that cost the check next to nothing
    (a data block with a cell and no atoms: read, rejected, an error row)."""
    import io
    import tarfile

    from bondcheck.scan import Scanner

    tpath = os.path.join(workdir, "tiny.tar")
    if not os.path.exists(tpath):
        with tarfile.open(tpath, "w") as tf:
            for i in range(n):
                data = f"data_kl{i}\n_cell_length_a 5.0\n".encode()
                info = tarfile.TarInfo(f"tiny-{i:07d}.cif")
                info.size = len(data)
                tf.addfile(info, io.BytesIO(data))
    db = os.path.join(workdir, f"tiny-{time.time_ns()}.sqlite") if store else None
    cpu0 = time.process_time()
    t0 = time.perf_counter()
    sc = Scanner([tpath], store=db, jobs=2, full_rows=False)
    k = sum(1 for _ in sc.rows())
    wall = time.perf_counter() - t0
    return {"name": f"machinery {n}" + (" +store" if store else ""), "entries": k, "wall_s": round(wall, 2),
            "files_per_s": round(k / wall, 1),
            "main_cpu_ms_per_file": round(1000 * (time.process_time() - cpu0) / k, 3),
            "load_after": round(os.getloadavg()[0], 2)}


# --------------------------------------------------------------------------
# driver


def pick(limit: int) -> list[str]:
    files = sorted(str(p) for p in CORPUS.rglob("*.cif"))
    if limit and len(files) > limit:
        step = len(files) / limit
        files = [files[int(i * step)] for i in range(limit)]
    return files


def run_one(name: str, workdir: str) -> dict:
    env = dict(os.environ, CI="true")
    res = subprocess.run([sys.executable, str(HERE), "--one", name, "--workdir", workdir],
                         capture_output=True, text=True, env=env)
    if res.returncode != 0:
        raise SystemExit(f"{name} failed:\n{res.stderr}")
    return json.loads(res.stdout.strip().splitlines()[-1])


TARGET_PER_CORE, SCRIPT_REFERENCE = 2000.0, 150.0  # files/s: the target, and the script where it was set


def paired(rounds: int, workdir: str) -> int:
    import statistics

    print("| round | order | bondcheck batched CPU ms/file | pymatgen script CPU ms/file | ratio |")
    print("|---:|---|---:|---:|---:|")
    ratios, ours, theirs = [], [], []
    for r in range(rounds):
        order = ("batched", "pymatgen") if r % 2 == 0 else ("pymatgen", "batched")
        got = {name: run_one(name, workdir)["main_cpu_ms_per_file"] for name in order}
        ours.append(got["batched"])
        theirs.append(got["pymatgen"])
        ratios.append(got["pymatgen"] / got["batched"])
        print(f"| {r + 1} | {' then '.join(order)} | {got['batched']:.3f} | {got['pymatgen']:.3f} | {ratios[-1]:.2f}x |",
              flush=True)
    need = TARGET_PER_CORE / SCRIPT_REFERENCE
    med = statistics.median(ratios)
    print()
    print(f"median ratio of CPU per file (script / bondcheck): {med:.2f}x (range {min(ratios):.2f}-{max(ratios):.2f}x)")
    print(f"per core on this machine: bondcheck {1000 / statistics.median(ours):.0f} files/s, "
          f"script {1000 / statistics.median(theirs):.0f} files/s")
    print(f"the per-core target read against the script: {TARGET_PER_CORE:.0f} / {SCRIPT_REFERENCE:.0f} = {need:.1f}x "
          f"its rate; measured {med:.2f}x ({med / need:.0%} of it)")
    return 0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--limit", type=int, default=1000, help="corpus files to use, spread evenly (0: all)")
    ap.add_argument("--flat", type=int, default=0, metavar="N", help="also scan N entries to watch memory")
    ap.add_argument("--skip-pymatgen", action="store_true")
    ap.add_argument("--only-flat", action="store_true", help="only the --flat and --machinery measurements")
    ap.add_argument("--machinery", type=int, default=0, metavar="N",
                    help="also scan N entries that cost the check nothing: the scan's own ceiling")
    ap.add_argument("--paired", type=int, default=0, metavar="R",
                    help="only batched against pymatgen, R interleaved rounds (CPU per file)")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--workdir", help=argparse.SUPPRESS)
    args = ap.parse_args()

    if args.one:
        files = Path(args.workdir, "files.txt").read_text().split("\n")
        files = [f for f in files if f]
        if args.one.startswith("flat"):
            res = flat(int(args.one.split()[1]), files, args.workdir)
        elif args.one.startswith("machinery"):
            parts = args.one.split()
            res = machinery(int(parts[1]), args.workdir, parts[-1] == "store")
        else:
            res = one(args.one, files, args.workdir)
        print(json.dumps(res))
        return 0

    if not CORPUS.is_dir():
        print(f"bench_scan: corpus not found at {CORPUS}; nothing to measure")
        return 0
    files = pick(args.limit)
    import platform

    print(f"# {len(files)} CIF files from {CORPUS.resolve()}; {os.cpu_count()} cores; "
          f"Python {platform.python_version()}")
    with tempfile.TemporaryDirectory(prefix="bench-scan-") as wd:
        Path(wd, "files.txt").write_text("\n".join(files) + "\n")
        if args.paired:
            return paired(args.paired, wd)
        names = ["loop", "loop+symmetry", "batched", "inline", "jobs=1", "jobs=2", "jobs=1 warm", "jobs=2 warm",
                 "store", "rerun"]
        if not args.skip_pymatgen:
            names.append("pymatgen")
        if args.only_flat:
            names = []
        results = {}
        for name in names:
            r = results[name] = run_one(name, wd)
            print(json.dumps(r), flush=True)
        if args.flat:
            print(json.dumps(run_one(f"flat {args.flat}", wd)), flush=True)
        if args.machinery:
            print(json.dumps(run_one(f"machinery {args.machinery}", wd)), flush=True)
            print(json.dumps(run_one(f"machinery {args.machinery} store", wd)), flush=True)
    if not names:
        return 0

    lp, il = results["loop"], results["inline"]
    j1, j2 = results["jobs=1"], results["jobs=2"]
    print()
    print("| measurement | files/s | main-process CPU per file (ms) | peak RSS, all processes (MB) | load avg |")
    print("|---|---:|---:|---:|---:|")
    for name in names:
        r = results[name]
        print(f"| {name} | {r['files_per_s']:.1f} | {r['main_cpu_ms_per_file']:.2f} | {r['peak_rss_all_mb']:.0f} "
              f"| {r['load_before']:.1f}-{r['load_after']:.1f} |")
    over = il["main_cpu_ms_per_file"] - lp["main_cpu_ms_per_file"]
    print()
    print(f"scan overhead per entry, CPU (inline - loop): {over:.2f} ms of {lp['main_cpu_ms_per_file']:.2f} ms; "
          f"main-process CPU per entry with 2 workers: {j2['main_cpu_ms_per_file']:.2f} ms")
    w1, w2 = results["jobs=1 warm"], results["jobs=2 warm"]
    print(f"scaling 1 -> 2 jobs: {j2['files_per_s'] / j1['files_per_s']:.2f}x; "
          f"with the worker server up: {w2['files_per_s'] / w1['files_per_s']:.2f}x")
    print(f"per core (jobs=2 / 2): {j2['files_per_s'] / 2:.1f} files/s; "
          f"with the worker server up: {w2['files_per_s'] / 2:.1f} files/s")
    if "pymatgen" in results:
        print(f"bondcheck scan (2 jobs) / pymatgen script (1 process): "
              f"{j2['files_per_s'] / results['pymatgen']['files_per_s']:.2f}x; "
              f"per process (jobs=1 / pymatgen): {j1['files_per_s'] / results['pymatgen']['files_per_s']:.2f}x")
        print(f"the same with the worker server up: "
              f"{w2['files_per_s'] / results['pymatgen']['files_per_s']:.2f}x; "
              f"per process {w1['files_per_s'] / results['pymatgen']['files_per_s']:.2f}x")
        if "batched" in results:
            pm, bt = results["pymatgen"], results["batched"]
            print(f"per core, CPU time per file: pymatgen script {pm['main_cpu_ms_per_file']:.2f} ms, "
                  f"bondcheck batched {bt['main_cpu_ms_per_file']:.2f} ms: "
                  f"{pm['main_cpu_ms_per_file'] / bt['main_cpu_ms_per_file']:.1f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
