"""A longer fuzz campaign: hostile variants of real CIFs through the whole pipeline.

    python tools/fuzz_campaign.py [--minutes 5] [--jobs 2] [--timeout 20] [--stage check|read]
                                  [--out fuzz-findings] [--start 0] [--engine mutations|hypothesis]

Inputs come from tests/fuzz_inputs.py: ase's bundled COD mineral CIFs and
pymatgen's bundled structures (written with CifWriter), mutated at the
byte, token and structure level.  Input k of seed s is ``make(s, k)`` (engine
``mutations``, the default: every input can be made again from its seed and
number) or drawn by hypothesis (engine ``hypothesis``: the same mutations,
with hypothesis choosing seeds and random draws, derandomized).

Each input is written to a file and checked with ``bondcheck.api.check_all``
(``--stage check``) or only read (``--stage read``), in worker processes so
that a hang can be stopped.  A failure is

* an exception out of check_all, or out of the text or JSON renderers;
* an error row whose reason names a Python exception (a bug caught by a last
  guard) or is empty or spans lines;
* an input still running after ``--timeout`` seconds.

Failures are grouped by where they happen; one input of each group is saved
in ``--out`` with its traceback (``<group>.cif`` and ``<group>.txt``), ready to
become a regression file in tests/data/bad/.  The closing lines give inputs
tried, their rate, and the groups.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import multiprocessing as mp
from multiprocessing.connection import wait
import os
import re
import sys
import tempfile
import time
import traceback
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

CRASH = re.compile(r"unexpected \w+|\((?:[A-Z]\w*Error|[A-Z]\w*Exception|KeyError|StopIteration)\b")
SLOW = 5.0


def judge(path: str, stage: str) -> tuple[str | None, str, float]:
    """(failure or None, a short summary, seconds) for one input file."""
    t0 = time.perf_counter()
    try:
        if stage == "read":
            from bondcheck.read import read
            from bondcheck.record import StructureError
            try:
                crystals = read(path)
            except StructureError as exc:
                msg = str(exc)
                if CRASH.search(msg) or "\n" in msg or not msg:
                    return f"bad reason: {msg!r}", "error", time.perf_counter() - t0
                return None, "error", time.perf_counter() - t0
            return None, f"ok {len(crystals)}", time.perf_counter() - t0
        from bondcheck.api import check_all
        from bondcheck.render.json import to_json
        from bondcheck.render.text import render

        results = check_all([path])
        render(results)
        json.loads(to_json(results))
    except Exception:
        return traceback.format_exc(), "exception", time.perf_counter() - t0
    seconds = time.perf_counter() - t0
    if not results:
        return "no result row", "none", seconds
    for r in results:
        if r.status == "error":
            if not r.error or "\n" in r.error or CRASH.search(r.error):
                return f"bad reason: {r.error!r}", "error", seconds
        elif r.status != "ok":
            return f"status {r.status!r}", r.status, seconds
    return None, ",".join(sorted({r.status for r in results})), seconds


def signature(failure: str) -> str:
    """Group failures by the innermost frame of bondcheck code and the exception type."""
    frames = re.findall(r'File "([^"]+)", line (\d+), in (\w+)', failure)
    ours = [f for f in frames if "bondcheck" in f[0]]
    last = failure.strip().splitlines()[-1] if failure.strip() else failure
    kind = last.split(":")[0]
    if ours:
        f = ours[-1]
        key = f"{Path(f[0]).name}:{f[2]}:{kind}"
    else:
        key = re.sub(r"\d+(\.\d+)?", "N", last)[:120]
    return hashlib.blake2b(key.encode(), digest_size=5).hexdigest() + " " + key


# -- workers -----------------------------------------------------------------

def _worker(conn, stage: str, tmpdir: str) -> None:
    import warnings

    warnings.simplefilter("ignore")
    from tests.fuzz_inputs import make

    path = os.path.join(tmpdir, f"input-{os.getpid()}.cif")
    while True:
        job = conn.recv()
        if job is None:
            return
        name, number, data = job
        if data is None:
            data = make(name, number)
        with open(path, "wb") as fh:
            fh.write(data)
        failure, summary, seconds = judge(path, stage)
        conn.send((failure, summary, seconds))


class Pool:
    def __init__(self, jobs: int, stage: str, tmpdir: str):
        self.ctx = mp.get_context("fork")
        self.stage, self.tmpdir = stage, tmpdir
        self.workers = [self._spawn() for _ in range(jobs)]

    def _spawn(self):
        a, b = self.ctx.Pipe()
        p = self.ctx.Process(target=_worker, args=(b, self.stage, self.tmpdir), daemon=True)
        p.start()
        return {"proc": p, "conn": a, "job": None, "t": 0.0}

    def replace(self, w) -> None:
        w["proc"].kill()
        w["proc"].join()
        self.workers[self.workers.index(w)] = self._spawn()

    def close(self) -> None:
        for w in self.workers:
            w["proc"].kill()
            w["proc"].join()


def run(args) -> int:
    import warnings

    warnings.simplefilter("ignore")
    from tests.fuzz_inputs import make, mutate, seeds

    names = sorted(seeds())
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    deadline = time.monotonic() + 60 * args.minutes

    if args.engine == "hypothesis":
        jobs_iter = _hypothesis_inputs(names, seeds, mutate)
    else:
        def gen():
            k = args.start
            while True:
                for name in names:
                    yield name, k, None
                k += 1
        jobs_iter = gen()

    groups: dict[str, dict] = {}
    tried = slow = 0
    statuses: dict[str, int] = {}
    t0 = time.monotonic()
    with tempfile.TemporaryDirectory(prefix="bondcheck-fuzz-") as tmp:
        pool = Pool(args.jobs, args.stage, tmp)
        try:
            while True:
                now = time.monotonic()
                for w in pool.workers:
                    if w["job"] is None and now < deadline:
                        w["job"] = next(jobs_iter, None)
                        if w["job"] is not None:
                            w["conn"].send(w["job"])
                            w["t"] = now
                active = [w for w in pool.workers if w["job"] is not None]
                if not active:
                    break
                ready = wait([w["conn"] for w in active], timeout=0.2)
                now = time.monotonic()
                for w in active:
                    if w["conn"] in ready:
                        try:
                            failure, summary, seconds = w["conn"].recv()
                        except (EOFError, OSError):  # the worker died under this input
                            w["proc"].join(5)
                            code = w["proc"].exitcode
                            tried += 1
                            statuses["died"] = statuses.get("died", 0) + 1
                            _record(groups, out, w["job"], f"worker died: exit code {code}", make)
                            pool.replace(w)
                            continue
                        tried += 1
                        key = summary.split(" ")[0]
                        statuses[key] = statuses.get(key, 0) + 1
                        slow += seconds > SLOW
                        if failure:
                            _record(groups, out, w["job"], failure, make)
                        w["job"] = None
                    elif now - w["t"] > args.timeout:
                        tried += 1
                        statuses["hang"] = statuses.get("hang", 0) + 1
                        _record(groups, out, w["job"], f"hang: still running after {args.timeout:g} s", make)
                        pool.replace(w)
        finally:
            pool.close()
    elapsed = time.monotonic() - t0
    print(f"inputs tried: {tried} in {elapsed:.0f} s ({tried / elapsed:.1f}/s, {args.jobs} workers, "
          f"stage {args.stage}, engine {args.engine})")
    print("outcomes: " + ", ".join(f"{k} {v}" for k, v in sorted(statuses.items())) + f"; slower than {SLOW:g} s: {slow}")
    print(f"failure groups: {len(groups)}")
    for sig, g in sorted(groups.items()):
        print(f"  {sig}  x{g['count']}  first: {g['seed']} #{g['number']}")
    return 1 if groups else 0


def _record(groups, out: Path, job, failure: str, make) -> None:
    name, number, data = job
    sig = signature(failure)
    if failure.startswith(("hang", "worker died")):
        sig = f"{sig} [{name}]"
    g = groups.setdefault(sig, {"count": 0, "seed": name, "number": number})
    g["count"] += 1
    if g["count"] == 1:
        stem = hashlib.blake2b(sig.encode(), digest_size=5).hexdigest()
        (out / f"{stem}.cif").write_bytes(data if data is not None else make(name, number))
        (out / f"{stem}.txt").write_text(f"seed {name} input {number}\n{sig}\n\n{failure}\n")


def _hypothesis_inputs(names, seeds, mutate):
    """Inputs drawn by hypothesis (derandomized), fed to the pool one by one."""
    import queue
    import threading

    from hypothesis import HealthCheck, Phase, given, settings
    from hypothesis import strategies as st

    q: queue.Queue = queue.Queue(maxsize=64)
    counter = iter(range(10**12))

    @settings(max_examples=10**9, deadline=None, derandomize=True, database=None,
              phases=[Phase.generate], suppress_health_check=list(HealthCheck))
    @given(st.sampled_from(names), st.randoms(use_true_random=False))
    def produce(name, rnd):
        q.put((name, next(counter), mutate(seeds()[name], rnd)))

    threading.Thread(target=produce, daemon=True).start()
    while True:
        yield q.get()


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--minutes", type=float, default=5.0)
    p.add_argument("--jobs", type=int, default=max(1, os.cpu_count() or 1))
    p.add_argument("--timeout", type=float, default=20.0, help="seconds before an input counts as a hang")
    p.add_argument("--stage", choices=["check", "read"], default="check")
    p.add_argument("--engine", choices=["mutations", "hypothesis"], default="mutations")
    p.add_argument("--start", type=int, default=0, help="first input number (engine mutations)")
    p.add_argument("--out", default="fuzz-findings", help="folder for one saved input per failure group")
    return run(p.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
