"""CPU time of the count stage alone, on the count() calls a real run makes.

    python benchmarks/bench_count.py record /tmp/count_calls.pkl --limit 1500
    python benchmarks/bench_count.py time /tmp/count_calls.pkl
    python benchmarks/bench_count.py verify /tmp/count_calls.pkl

record: runs bondcheck.api.check_crystal with Options(symmetry=False) on the
first N files of ../shared/corpus/mp-relaxed (or --corpus FOLDER; sorted by
name) and keeps every call of bondcheck.count.count (from the check itself and
from diagnose's variants) with its arguments and its result, in call order, in
a pickle. Record with the count code whose results are the reference.

time: replays the calls in order (the count stage remembers the last
structure, so the order matters) and prints the CPU time (time.process_time)
per call and per structure, best of --repeat runs.

verify: replays the calls once and compares every result, field by field
(arrays exactly, floats exactly), with the recorded one; prints the number of
differing calls and the first few differences. A check between versions of
the count stage; benchmarks/compare_results.py stays the guard for whole
results.

Skips with a message when the corpus (record) or the pickle (time, verify) is
absent.
"""
from __future__ import annotations

import argparse
import pickle
import sys
import time
from pathlib import Path

import numpy as np

CORPUS = Path(__file__).resolve().parents[1] / ".." / "shared" / "corpus"


def record(out: str, limit: int, folder: str) -> None:
    from bondcheck import api, count as count_mod, diagnose
    from bondcheck.read import read
    from bondcheck.record import StructureError

    files = sorted((CORPUS / folder).glob("*.cif"))
    if not files:
        print(f"no corpus at {CORPUS / folder}: skipped")
        return
    files = files[:limit] if limit else files
    calls = []
    original = count_mod.count

    def recording(*args, **kwargs):
        # Pickled at once: the caller may change the result (or the
        # arguments) afterwards.
        res = original(*args, **kwargs)
        calls.append(pickle.dumps((args, kwargs, res)))
        return res

    api.count = diagnose.count = recording
    opts = api.Options(symmetry=False)
    structures = 0
    for f in files:
        try:
            crystals = read(str(f))
        except StructureError:
            continue
        for c in crystals:
            api.check_crystal(c, opts)
            structures += 1
    with open(out, "wb") as fh:
        pickle.dump({"structures": structures, "calls": [pickle.loads(c) for c in calls]}, fh)
    print(f"{len(calls)} count() calls from {structures} structures -> {out}")


def _load(path: str):
    if not Path(path).exists():
        print(f"no recorded calls at {path} (run record first): skipped")
        sys.exit(0)
    with open(path, "rb") as fh:
        return pickle.load(fh)


def time_calls(path: str, repeat: int) -> None:
    from bondcheck.count import count

    data = _load(path)
    calls = data["calls"]
    best = float("inf")
    for _ in range(repeat):
        t0 = time.process_time()
        for args, kwargs, _res in calls:
            count(*args, **kwargs)
        best = min(best, time.process_time() - t0)
    n = len(calls)
    print(
        f"{n} calls, {data['structures']} structures: {best:.3f} s CPU, "
        f"{1e3 * best / n:.4f} ms per call, {1e3 * best / data['structures']:.4f} ms per structure"
    )


def _diff(a, b, where: str, out: list) -> None:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        if not (isinstance(a, np.ndarray) and isinstance(b, np.ndarray)):
            out.append(f"{where}: array vs {type(b).__name__}")
        elif a.dtype != b.dtype or a.shape != b.shape or not np.array_equal(a, b):
            out.append(f"{where}: arrays differ")
        return
    if hasattr(a, "__slots__") and type(a) is type(b):
        for name in type(a).__slots__:
            _diff(getattr(a, name), getattr(b, name), f"{where}.{name}", out)
        return
    if isinstance(a, dict) and isinstance(b, dict):
        if list(a) != list(b):
            out.append(f"{where}: keys {list(a)} != {list(b)}")
        for k in a:
            if k in b:
                _diff(a[k], b[k], f"{where}[{k}]", out)
        return
    if isinstance(a, (list, tuple)) and isinstance(b, (list, tuple)):
        if type(a) is not type(b) or len(a) != len(b):
            out.append(f"{where}: {a!r} != {b!r}")
            return
        for k, (x, y) in enumerate(zip(a, b)):
            _diff(x, y, f"{where}[{k}]", out)
        return
    if type(a) is not type(b) or a != b:
        if not (a != a and b != b):  # both NaN
            out.append(f"{where}: {a!r} ({type(a).__name__}) != {b!r} ({type(b).__name__})")


def verify(path: str) -> int:
    from bondcheck.count import count

    calls = _load(path)["calls"]
    bad = 0
    for k, (args, kwargs, res) in enumerate(calls):
        out: list[str] = []
        _diff(res, count(*args, **kwargs), "count", out)
        if out:
            bad += 1
            if bad <= 5:
                print(f"call {k} ({args[0].name}):", "; ".join(out[:5]))
    print(f"{bad} of {len(calls)} calls differ")
    return bad


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("action", choices=("record", "time", "verify"))
    ap.add_argument("pickle")
    ap.add_argument("--limit", type=int, default=1500, help="first N files (record); 0 = all")
    ap.add_argument("--corpus", default="mp-relaxed", help="folder of ../shared/corpus (record)")
    ap.add_argument("--repeat", type=int, default=3, help="timing runs, best kept (time)")
    a = ap.parse_args()
    if a.action == "record":
        record(a.pickle, a.limit, a.corpus)
    elif a.action == "time":
        time_calls(a.pickle, a.repeat)
    else:
        sys.exit(1 if verify(a.pickle) else 0)


if __name__ == "__main__":
    main()
