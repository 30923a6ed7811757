"""`bondcheck report INPUT... -o report.html`: a self-contained HTML report.

INPUT is any mix of structure files, directories of them, and results files
(`.jsonl`/`.ndjson` JSON Lines, a `.json` array as written by
`bondcheck check --format json`, `.csv`, `.parquet`) whose rows carry the keys
of `Result.to_dict()`. Structures are checked here and get figures; result
rows are shown as they are, and get figures when their structure file is at
hand (see --plots).
"""
from __future__ import annotations

import os
import sys

RESULT_SUFFIXES = (".jsonl", ".ndjson", ".csv", ".parquet", ".pq")
SQLITE_MAGIC = b"SQLite format 3\x00"
EXIT_OK, EXIT_INPUT = 0, 2


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "report",
        help="write a self-contained HTML report with plots (structures or a scan's results)",
        description="Write one HTML file (no network, no files beside it) for structures or for the results of a scan.",
    )
    p.add_argument(
        "inputs",
        nargs="+",
        metavar="INPUT",
        help="structure files, directories, or results: .jsonl, .json, .csv, .parquet, or a scan's results store",
    )
    p.add_argument("-o", "--output", default="report.html", help="HTML file to write ('-' for standard output; default report.html)")
    p.add_argument("--title", help="page title (default: from the inputs)")
    p.add_argument(
        "--plots",
        choices=["auto", "all", "none"],
        default="auto",
        help="figures per entry: auto = every structure given directly, and result rows that are not consistent when their "
        "file is at hand; all = also consistent result rows; none = no figures (default auto)",
    )
    p.add_argument("--max-plots", type=int, default=100, metavar="N", help="at most N entries with figures, mismatches first (default 100)")
    p.add_argument(
        "--max-sections",
        type=int,
        default=1000,
        metavar="N",
        help="at most N entries get a section of their own, flagged ones first; the rest are rows of the table (default 1000)",
    )
    p.add_argument("--jobs", type=int, default=0, metavar="N", help="worker processes drawing figures (default: all cores)")
    p.add_argument("--anions", help="comma-separated anion elements for the structures checked here")
    p.add_argument("--valence", action="append", metavar="El=n", help="override valence electrons, e.g. Eu=2 (repeatable)")
    p.add_argument("--block", help="only this data block of multi-block CIFs")
    p.set_defaults(run=run)


def is_results_file(path) -> bool:
    """A results file: by suffix, or a .json file holding an array of result
    rows (a pymatgen structure JSON is an object)."""
    from pathlib import Path

    p = Path(path)
    name = p.name.lower()
    if name.endswith(RESULT_SUFFIXES) or name.endswith(tuple(s + ".gz" for s in RESULT_SUFFIXES)):
        return True
    if p.is_file() and not name.endswith(".json"):
        with open(p, "rb") as fh:
            return fh.read(16) == SQLITE_MAGIC  # a scan's results store
    if name.endswith(".json") and p.is_file():
        with open(p, "rb") as fh:
            head = fh.read(4096).lstrip()
        if head.startswith(b"["):
            return True
        if head.startswith(b"{") and b'"results"' in head[:200]:
            return True
    return False


def read_results(path) -> list[dict]:
    """Rows of a results file, with list and dict fields decoded."""
    import gzip
    import json
    from pathlib import Path

    from ..record import StructureError

    p = Path(path)
    name = p.name.lower()
    opener = gzip.open if name.endswith(".gz") else open
    base = name[:-3] if name.endswith(".gz") else name
    try:
        if base.endswith((".parquet", ".pq", ".csv")) and not name.endswith(".gz") or is_store(p):
            # The scan's own reader knows how it flattens rows.
            from ..scan import read_rows

            rows = list(read_rows(str(p)))
        elif base.endswith(".csv"):
            import csv

            with opener(p, "rt", encoding="utf-8", newline="") as fh:
                rows = list(csv.DictReader(fh))
        elif base.endswith((".jsonl", ".ndjson")):
            rows = []
            with opener(p, "rt", encoding="utf-8") as fh:
                for n, line in enumerate(fh, 1):
                    line = line.strip()
                    if not line:
                        continue
                    try:
                        rows.append(json.loads(line))
                    except json.JSONDecodeError as exc:
                        raise StructureError(f"{path}: line {n} is not JSON ({exc.msg})") from None
        else:
            with opener(p, "rt", encoding="utf-8") as fh:
                data = json.load(fh)
            if isinstance(data, dict):
                data = data.get("results", [])
            rows = data
    except StructureError:
        raise
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise StructureError(f"{path}: cannot read results ({exc})") from None
    except Exception as exc:  # pyarrow raises its own types
        raise StructureError(f"{path}: cannot read results ({type(exc).__name__}: {exc})") from None
    if not isinstance(rows, list) or not all(isinstance(r, dict) for r in rows):
        raise StructureError(f"{path}: not a list of result rows")
    return [normalise_row(r) for r in rows]


def is_store(path) -> bool:
    from pathlib import Path

    p = Path(path)
    if not p.is_file():
        return False
    with open(p, "rb") as fh:
        return fh.read(16) == SQLITE_MAGIC


_LISTS = ("causes", "cations", "anions", "sites", "findings")
_NUMBERS = (
    "vec_anion",
    "aa_predicted",
    "aa_observed",
    "cc_observed",
    "residual",
    "electrons_per_formula",
    "anions_per_formula",
    "seconds",
)


def normalise_row(row: dict) -> dict:
    """Rows from CSV or Parquet may hold lists as JSON text or joined strings,
    and numbers as text; bring them to the shape of Result.to_dict()."""
    import json
    import re

    r = dict(row)
    for k in _LISTS:
        v = r.get(k)
        if isinstance(v, str):
            s = v.strip()
            if s.startswith(("[", "{")):
                try:
                    r[k] = json.loads(s)
                    continue
                except json.JSONDecodeError:
                    pass
            r[k] = [x for x in re.split(r"[;,|\s]+", s) if x] if k in ("causes", "cations", "anions") else []
        elif v is None:
            r[k] = []
    for k in _NUMBERS:
        v = r.get(k)
        if isinstance(v, str):
            try:
                r[k] = float(v) if v.strip() else None
            except ValueError:
                r[k] = None
    for k in ("verdict", "error"):
        if r.get(k) == "":
            r[k] = None
    if not r.get("status"):
        r["status"] = "ok" if r.get("verdict") else "error"
    return r


def _split_source(path: str) -> tuple[str, str | None]:
    """'file.cif#block' -> ('file.cif', 'block')."""
    from pathlib import Path

    if Path(path).exists() or "#" not in path:
        return path, None
    base, _, block = path.rpartition("#")
    return base, block or None


PARALLEL_FROM = 6  # figures to draw before worker processes pay off


def figure_job(job) -> tuple[dict | None, object | None]:
    """Check one structure and draw its figures (in a worker process).
    job = (entry number, crystal or None, path, block, options); returns the
    fresh result row and the Detail with its figures (result dropped), or
    (None, None) when the structure cannot be read or checked."""
    from ..read import read
    from ..record import StructureError
    from ..render import plots

    n, crystal, path, block, opts = job
    if crystal is None:
        try:
            found = read(path, block=block)
        except StructureError:
            return None, None
        if len(found) != 1:
            return None, None
        crystal = found[0]
    det = plots.collect(crystal, opts)
    row = det.result.to_dict()
    if row.get("status") != "ok":
        return row, None
    det.figures = plots.render_figures(det, f"e{n + 1}")
    det.result = None
    return row, det


def run(args) -> int:
    from pathlib import Path

    from .. import elements
    from ..api import Options, Result, iter_inputs
    from ..bonds import Criterion
    from ..cli import _valence
    from ..read import read
    from ..record import StructureError
    from ..render import html as H

    try:
        valence = _valence(args.valence)
    except Exception as exc:
        print(f"bondcheck report: {exc}", file=sys.stderr)
        return EXIT_INPUT
    anions = [a.strip() for a in args.anions.split(",") if a.strip()] if args.anions else None
    known = elements.numbers()
    for el in list(valence) + (anions or []):
        if el not in known:
            print(f"bondcheck report: unknown element {el!r}", file=sys.stderr)
            return EXIT_INPUT
    if args.max_plots < 0 or args.max_sections < 0:
        print("bondcheck report: --max-plots and --max-sections must be 0 or more", file=sys.stderr)
        return EXIT_INPUT
    opts = Options(anions=anions, valence=valence, criterion=Criterion())

    # (row, crystal or None, given directly?)
    items: list[list] = []
    problems = 0
    for inp in args.inputs:
        p = Path(inp)
        if not p.exists():
            items.append([Result(path=inp, status="error", error="no such file or directory").to_dict(), None, True])
            problems += 1
            continue
        if p.is_file() and is_results_file(p):
            try:
                rows = read_results(p)
            except StructureError as exc:
                print(f"bondcheck report: {exc}", file=sys.stderr)
                return EXIT_INPUT
            items.extend([r, None, False] for r in rows)
            continue
        for src in iter_inputs([p]):
            try:
                crystals = read(src, block=args.block)
            except StructureError as exc:
                items.append([Result(path=str(src), status="error", error=str(exc)).to_dict(), None, True])
                continue
            for cr in crystals:
                items.append([None, cr, True])
    if not items:
        print("bondcheck report: no structures or results found", file=sys.stderr)
        return EXIT_INPUT

    # Which entries get figures: structures given directly, then result rows
    # whose file is at hand; mismatches first, up to --max-plots.
    def wants(item) -> bool:
        row, cr, direct = item
        if args.plots == "none":
            return False
        if cr is not None:
            return True
        if direct or row.get("status", "ok") != "ok":
            return False
        if args.plots == "auto" and row.get("verdict") == "consistent":
            return False
        path, _ = _split_source(str(row.get("path") or ""))
        return bool(path) and Path(path).is_file()

    def priority(n: int) -> tuple:
        row, cr, _ = items[n]
        if cr is not None:  # structures given directly come first, in input order
            return (0, n)
        return ({"mismatch": 1, "not-applicable": 3}.get(row.get("verdict"), 2), n)

    wanted = sorted((n for n, it in enumerate(items) if wants(it)), key=priority)
    chosen = set(wanted[: args.max_plots])
    # Figures: in worker processes when there are several to draw.
    jobs = []
    for n in sorted(chosen):
        row, cr, _ = items[n]
        if cr is not None:
            jobs.append((n, cr, None, None, opts))
        else:
            path, block = _split_source(str(row.get("path")))
            jobs.append((n, None, path, block, opts))
    drawn: dict[int, tuple] = {}
    n_jobs = max(1, min(args.jobs or os.cpu_count() or 1, len(jobs)))
    if n_jobs > 1 and len(jobs) >= PARALLEL_FROM:
        from concurrent.futures import ProcessPoolExecutor

        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot  # noqa: F401  (loaded once, before the workers fork)

        with ProcessPoolExecutor(max_workers=n_jobs) as pool:
            for n, out in zip((j[0] for j in jobs), pool.map(figure_job, jobs, chunksize=2)):
                drawn[n] = out
    else:
        for job in jobs:
            drawn[job[0]] = figure_job(job)

    from ..api import check_crystal

    entries = []
    for n, (row, cr, direct) in enumerate(items):
        fresh, det = drawn.get(n, (None, None))
        if cr is not None:
            note = ""
            if fresh is None:
                fresh = check_crystal(cr, opts).to_dict()
                if args.plots != "none" and fresh.get("status") == "ok":
                    note = f"Figures left out: --max-plots {args.max_plots} reached."
            entries.append(H.Entry(fresh, det, note))
            continue
        note = ""
        if det is not None:
            note = "Figures recomputed from the structure file with this report's settings."
            if fresh.get("verdict") != row.get("verdict"):
                note += f" With these settings the verdict is {fresh.get('verdict')}, not {row.get('verdict')}."
        entries.append(H.Entry(row, det, note))
    if args.title:
        title = args.title
    elif len(args.inputs) == 1:
        title = f"bondcheck report: {Path(args.inputs[0]).name}"
    else:
        title = f"bondcheck report: {len(entries)} entries"
    page = H.render(entries, title=title, settings=opts.key(), max_sections=args.max_sections)
    if args.output == "-":
        sys.stdout.write(page)
    else:
        out = Path(args.output)
        tmp = out.with_name(out.name + ".tmp")
        tmp.write_text(page, encoding="utf-8")
        tmp.replace(out)
        shown = sum(1 for e in entries if e.detail is not None)
        print(f"bondcheck report: wrote {out} ({len(entries)} entries, {shown} with figures, {len(page) // 1024} KiB)", file=sys.stderr)
    return EXIT_INPUT if problems else EXIT_OK
