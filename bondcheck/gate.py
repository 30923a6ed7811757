"""Gate a structure repository: check the selected files, set each finding
against the acceptances of the configuration and the baseline, and decide
the exit status.

Decisions (documented in docs/ci.md):

* A finding *fails* the run when its severity is at or above ``fail-on``
  (default ``warning``), no acceptance covers it and the baseline does not
  hold it. An open count always carries a warning finding (electron-excess or
  electron-deficit), so a ``mismatch`` verdict fails through its findings.
* Findings at or above the *report level*, the lower of ``fail-on`` and
  ``warning``, are the ones the baseline records and the machine-readable
  reports list; info findings below it explain a closed count and stay in the
  per-structure details.
* The baseline keys a finding by the structure's fingerprint (a hash of the
  cell, the elements, occupancies and positions as read, rounded), the
  finding's slug and its sites, so editing comments or layout keeps it and
  a rename keeps it; changing the structure re-opens it.
* ``--changed-since REF`` checks the structure files that git reports as added
  or modified between the merge base of REF and HEAD and the working tree,
  plus untracked files that git does not ignore (so a local run sees a new
  file before ``git add``; in CI there are none).
* Exit status: 2 usage or configuration error, 3 unreadable inputs (unless
  ``unreadable = "finding"``), 1 failing findings, 0 pass; the first that
  applies wins.
"""
from __future__ import annotations

import hashlib
import json
import os
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

from .config import Config, ConfigError
from .findings import Finding

EXIT_PASS, EXIT_FINDINGS, EXIT_USAGE, EXIT_UNREADABLE = 0, 1, 2, 3
SEVERITY_RANK = {"info": 0, "warning": 1, "error": 2, "never": 3}
BASELINE_FORMAT = 1


class GateError(ValueError):
    """A usage problem (bad git reference, missing baseline ...): exit 2."""


class UnreadableInput(Finding):
    """Stands in for a structure that could not be checked when the
    configuration says ``unreadable = "finding"``."""

    slug = "unreadable-input"
    severity = "error"
    template = "{why}"
    title = "Input that could not be checked"
    meaning = (
        "The file could not be read as a crystal structure, or the structure it holds cannot be checked "
        "(no atoms, a degenerate cell, overlapping atoms). Nothing was counted."
    )
    fires_when = "Reading or checking the file raised an error, and the configuration asks for unreadable inputs to be findings."
    next_steps = "Open the file in a CIF editor or run 'bondcheck check FILE' for the reader's message; fix the file or accept it with a reason."


GATE_FINDINGS = (UnreadableInput,)


def report_rank(fail_on: str) -> int:
    return min(SEVERITY_RANK[fail_on], SEVERITY_RANK["warning"])


# --------------------------------------------------------------------------
# the record of one run


@dataclass(slots=True)
class Item:
    """One finding of one structure as the gate sees it."""

    slug: str
    severity: str
    message: str
    sites: list[str]
    evidence: dict
    state: str = "new"  # new | baseline | accepted
    failing: bool = False
    reason: str = ""  # the acceptance's reason, or the baseline file

    def to_dict(self) -> dict:
        return {
            "slug": self.slug,
            "severity": self.severity,
            "message": self.message,
            "sites": self.sites,
            "evidence": self.evidence,
            "state": self.state,
            "failing": self.failing,
            "reason": self.reason,
        }


@dataclass(slots=True)
class Checked:
    """One structure (one data block) of one file."""

    file: str  # relative to the root, posix
    path: str  # as opened
    structure: str
    fingerprint: str
    result: object | None = None  # api.Result
    items: list[Item] = field(default_factory=list)
    error: str | None = None
    seconds: float = 0.0

    @property
    def failed(self) -> bool:
        return any(i.failing for i in self.items)

    @property
    def unreadable(self) -> bool:
        return self.error is not None

    @property
    def quiet(self) -> list[Item]:
        return [i for i in self.items if i.state != "new"]

    def to_dict(self) -> dict:
        return {
            "file": self.file,
            "structure": self.structure,
            "fingerprint": self.fingerprint,
            "verdict": getattr(self.result, "verdict", None),
            "error": self.error,
            "failed": self.failed,
            "items": [i.to_dict() for i in self.items],
            "result": self.result.to_dict() if self.result is not None else None,
        }


@dataclass(slots=True)
class GateReport:
    root: Path
    config: str
    fail_on: str
    unreadable_mode: str
    checked: list[Checked] = field(default_factory=list)
    baseline_file: str | None = None
    gone: list[dict] = field(default_factory=list)
    unused_acceptances: list[str] = field(default_factory=list)
    changed_since: str | None = None
    files: int = 0
    filtered: int = 0
    seconds: float = 0.0

    @property
    def failing(self) -> list[tuple[Checked, Item]]:
        return [(c, i) for c in self.checked for i in c.items if i.failing]

    @property
    def unreadable(self) -> list[Checked]:
        return [c for c in self.checked if c.unreadable]

    @property
    def exit_code(self) -> int:
        if self.unreadable_mode == "fail" and self.unreadable:
            return EXIT_UNREADABLE
        if self.failing:
            return EXIT_FINDINGS
        return EXIT_PASS

    @property
    def report_rank(self) -> int:
        return report_rank(self.fail_on)

    def counts(self) -> dict[str, int]:
        items = [i for c in self.checked for i in c.items]
        return {
            "structures": len(self.checked),
            "files": self.files,
            "failed_structures": sum(c.failed for c in self.checked),
            "unreadable": len(self.unreadable),
            "new": sum(i.failing for i in items),
            "accepted": sum(i.state == "accepted" for i in items),
            "baseline": sum(i.state == "baseline" for i in items),
            "gone": len(self.gone),
        }

    def to_dict(self) -> dict:
        return {
            "root": str(self.root),
            "config": self.config,
            "fail_on": self.fail_on,
            "unreadable": self.unreadable_mode,
            "baseline": self.baseline_file,
            "changed_since": self.changed_since,
            "exit_code": self.exit_code,
            "counts": self.counts(),
            "structures": [c.to_dict() for c in self.checked],
            "gone": self.gone,
            "unused_acceptances": self.unused_acceptances,
            "seconds": round(self.seconds, 3),
        }


# --------------------------------------------------------------------------
# fingerprints and the baseline


def fingerprint(crystal) -> str:
    """SHA-256 of the structure as read: cell (0.001 A), and every atom's
    element, occupancy (0.001) and fractional position (0.0001), sorted, so
    the order of atoms, comments and the layout of the file do not matter."""
    import numpy as np

    cell = np.rint(np.asarray(crystal.cell, dtype=np.float64) * 1e3).astype(np.int64)
    frac = np.rint(np.asarray(crystal.frac, dtype=np.float64) * 1e4).astype(np.int64) % 10000
    occ = np.rint(np.asarray(crystal.occupancy, dtype=np.float64) * 1e3).astype(np.int64)
    z = np.asarray(crystal.numbers, dtype=np.int64)
    rows = np.column_stack([z, occ, frac]) if z.size else np.zeros((0, 5), dtype=np.int64)
    if rows.shape[0]:
        rows = rows[np.lexsort(rows.T[::-1])]
    h = hashlib.sha256(b"bondcheck-structure-1\n")
    h.update(np.ascontiguousarray(cell).tobytes())
    h.update(np.ascontiguousarray(rows).tobytes())
    return "sha256:" + h.hexdigest()


def bytes_fingerprint(path) -> str:
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:  # in chunks: a huge file costs no memory
            for chunk in iter(lambda: fh.read(1 << 20), b""):
                h.update(chunk)
    except OSError:
        h = hashlib.sha256()
    return "file-sha256:" + h.hexdigest()


def entry_key(fp: str, slug: str, sites) -> tuple:
    return (fp, slug, tuple(sorted(str(s) for s in sites)))


@dataclass(slots=True)
class Baseline:
    entries: list[dict] = field(default_factory=list)
    path: Path | None = None

    @classmethod
    def load(cls, path: Path) -> "Baseline":
        try:
            data = json.loads(Path(path).read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise GateError(f"no baseline at {path}; write one with 'bondcheck baseline write'") from None
        except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise GateError(f"cannot read the baseline {path}: {exc}") from None
        if not isinstance(data, dict) or data.get("format") != BASELINE_FORMAT or not isinstance(data.get("entries"), list):
            raise GateError(f"{path} is not a bondcheck baseline (format {BASELINE_FORMAT})")
        entries = []
        for k, e in enumerate(data["entries"]):
            if not isinstance(e, dict) or not all(isinstance(e.get(x), str) for x in ("file", "fingerprint", "finding")):
                raise GateError(f"{path}: entry {k + 1} lacks file, fingerprint or finding")
            e.setdefault("sites", [])
            entries.append(e)
        return cls(entries=entries, path=Path(path))

    def save(self, path: Path | None = None) -> Path:
        path = Path(path or self.path)
        entries = sorted(self.entries, key=lambda e: (e["file"], e.get("structure", ""), e["finding"], e["sites"]))
        doc = {
            "format": BASELINE_FORMAT,
            "about": "Findings known when the baseline was written; bondcheck gate fails only on findings not listed here. "
            "Keys: structure fingerprint + finding + sites. Rewrite with 'bondcheck baseline write', drop stale entries with 'bondcheck baseline prune'.",
            "entries": entries,
        }
        tmp = path.with_name(path.name + ".tmp")
        tmp.write_text(json.dumps(doc, indent=2, sort_keys=False) + "\n", encoding="utf-8")
        os.replace(tmp, path)
        self.path = path
        return path

    def index(self) -> dict[tuple, list[int]]:
        out: dict[tuple, list[int]] = {}
        for k, e in enumerate(self.entries):
            out.setdefault(entry_key(e["fingerprint"], e["finding"], e["sites"]), []).append(k)
        return out


def baseline_entries(report: GateReport) -> list[dict]:
    """Baseline entries for the report's findings at or above its report
    level that no acceptance covers."""
    out = []
    for c in report.checked:
        for i in c.items:
            if i.state == "accepted":
                continue
            out.append(
                {
                    "file": c.file,
                    "structure": c.structure,
                    "fingerprint": c.fingerprint,
                    "finding": i.slug,
                    "severity": i.severity,
                    "sites": sorted(i.sites),
                    "message": i.message,
                }
            )
    return out


# --------------------------------------------------------------------------
# which files


def changed_files(ref: str, cwd: Path | str | None = None) -> list[Path]:
    """Files added or modified since the merge base of ``ref`` and HEAD
    (committed, staged or in the working tree), plus untracked files that
    are not ignored. Deleted files are left out; a rename counts as an added
    file."""
    cwd = Path(cwd or os.getcwd())
    top = _git(["rev-parse", "--show-toplevel"], cwd).strip()
    if not top:
        raise GateError("--changed-since needs a git work tree")
    top_path = Path(top)
    try:
        base = _git(["merge-base", ref, "HEAD"], top_path).strip()
    except GateError as exc:
        _git(["rev-parse", "--verify", "--quiet", f"{ref}^{{commit}}"], top_path, what=f"unknown git reference {ref!r}")
        raise GateError(
            f"git finds no common ancestor of {ref!r} and HEAD ({exc}); in a shallow CI clone fetch the full history "
            "(e.g. fetch-depth: 0) or the base branch first"
        ) from None
    diff = _git(["diff", "--name-only", "--no-renames", "--diff-filter=AM", "-z", base, "--"], top_path)
    untracked = _git(["ls-files", "--others", "--exclude-standard", "--full-name", "-z"], top_path)
    names = [n for n in (diff + untracked).split("\0") if n]
    return sorted({top_path / n for n in names})


def _git(args: list[str], cwd: Path, what: str | None = None) -> str:
    try:
        proc = subprocess.run(["git", *args], cwd=cwd, capture_output=True, text=True, check=False)
    except FileNotFoundError:
        raise GateError("--changed-since needs git, which is not installed") from None
    if proc.returncode != 0:
        msg = (proc.stderr or proc.stdout).strip().splitlines()
        raise GateError(what or (msg[-1] if msg else f"git {' '.join(args)} failed"))
    return proc.stdout


def select_files(cfg: Config, paths: list[str] | None = None, changed: list[Path] | None = None,
                 cwd: Path | str | None = None) -> tuple[list[Path], int, list[str]]:
    """(files to check, number left out by include/exclude, paths named on
    the command line that do not exist). ``paths`` are relative to ``cwd``;
    without them the configuration's paths (relative to its root) are used."""
    from .read import _is_structure_name, iter_structure_files

    cwd = Path(cwd or os.getcwd())
    if paths:
        roots = [Path(os.path.abspath(cwd / p)) for p in paths]
    else:
        roots = [Path(os.path.abspath(cfg.root / p)) for p in cfg.paths]
    missing = [str(p) for p, r in zip(paths or [], roots) if not r.exists()]
    roots = [r for r in roots if r.exists()]
    candidates: list[Path] = []
    if changed is not None:
        for f in changed:
            f = Path(os.path.abspath(f))
            if not f.is_file() or not _is_structure_name(f.name):
                continue
            for r in roots:
                if f == r or (r in f.parents and not any(p.startswith(".") for p in f.relative_to(r).parts[:-1])):
                    candidates.append(f)
                    break
    else:
        for r in roots:
            candidates.extend(Path(os.path.abspath(p)) for p in iter_structure_files(r))
    seen: set[Path] = set()
    files, filtered = [], 0
    for f in candidates:
        if f in seen:
            continue
        seen.add(f)
        if cfg.selected(cfg.relative(f)):
            files.append(f)
        else:
            filtered += 1
    return sorted(files), filtered, missing


# --------------------------------------------------------------------------
# the run


def run(cfg: Config, files: list[Path], *, baseline: Baseline | None = None, full: bool = True,
        changed_since: str | None = None, filtered: int = 0, missing: list[str] = ()) -> GateReport:
    """Check ``files`` and judge every finding. ``full`` says the run covered
    everything the configuration selects, so baseline entries left unmatched
    are stale and acceptances that matched nothing are unused; otherwise an
    unmatched entry is stale when its file was checked, its structure was
    seen, or its file is gone."""
    from .api import Result, check_crystal
    from .read import read
    from .record import StructureError

    t0 = time.perf_counter()
    report = GateReport(
        root=cfg.root,
        config=cfg.describe(),
        fail_on=cfg.fail_on,
        unreadable_mode=cfg.unreadable,
        baseline_file=cfg.relative(baseline.path) if baseline is not None and baseline.path else None,
        changed_since=changed_since,
        files=len(files) + len(missing),
        filtered=filtered,
    )
    rank = report.report_rank
    fail_rank = SEVERITY_RANK[cfg.fail_on]
    index = baseline.index() if baseline is not None else {}
    used: set[int] = set()
    used_acc: set[int] = set()

    def judge(c: Checked, findings) -> None:
        for f in findings:
            d = f.to_dict() if hasattr(f, "to_dict") else dict(f)
            sev = d.get("severity", "info")
            if SEVERITY_RANK.get(sev, 0) < rank:
                continue
            item = Item(slug=d["slug"], severity=sev, message=d.get("message", ""), sites=[str(s) for s in d.get("sites", [])],
                        evidence=d.get("evidence", {}))
            acc = cfg.acceptance(c.file, c.structure, item.slug)
            if acc is not None:
                item.state, item.reason = "accepted", acc.reason
                used_acc.add(id(acc))
            else:
                hits = [k for k in index.get(entry_key(c.fingerprint, item.slug, item.sites), []) if k not in used]
                if hits:
                    used.add(hits[0])
                    item.state, item.reason = "baseline", report.baseline_file or ""
                else:
                    item.failing = SEVERITY_RANK.get(sev, 0) >= fail_rank
            c.items.append(item)

    def unreadable(path: Path, rel: str, name: str, why: str, t: float) -> None:
        c = Checked(file=rel, path=str(path), structure=name, fingerprint=bytes_fingerprint(path), error=why,
                    result=Result(path=str(path), status="error", error=why, name=name), seconds=t)
        if cfg.unreadable == "finding":
            judge(c, [UnreadableInput(why=why)])
        report.checked.append(c)

    for m in missing:
        p = Path(os.path.abspath(m))
        unreadable(p, cfg.relative(p), p.name, "no such file or directory", 0.0)
    for path in files:
        rel = cfg.relative(path)
        opts = cfg.options_for(rel)
        t1 = time.perf_counter()
        try:
            crystals = read(str(path))
        except StructureError as exc:
            unreadable(path, rel, path.name, str(exc), time.perf_counter() - t1)
            continue
        except Exception as exc:  # a reader bug must not lose the other files
            unreadable(path, rel, path.name, f"unexpected {type(exc).__name__}: {exc}", time.perf_counter() - t1)
            continue
        for cr in crystals:
            t2 = time.perf_counter()
            name = cr.name or path.name
            try:
                res = check_crystal(cr, opts)
            except Exception as exc:
                res = Result(path=cr.source or str(path), status="error", error=f"unexpected {type(exc).__name__}: {exc}", name=name)
            if res.status != "ok":
                unreadable(path, rel, name, res.error or "cannot be checked", time.perf_counter() - t2)
                continue
            c = Checked(file=rel, path=str(path), structure=name, fingerprint=fingerprint(cr), result=res,
                        seconds=time.perf_counter() - t2)
            judge(c, res.findings)
            report.checked.append(c)

    if baseline is not None:
        checked_files = {c.file for c in report.checked}
        checked_fps = {c.fingerprint for c in report.checked}
        for k, e in enumerate(baseline.entries):
            if k in used:
                continue
            if full or e["file"] in checked_files or e["fingerprint"] in checked_fps or not (cfg.root / e["file"]).exists():
                report.gone.append(e)
    if full:
        report.unused_acceptances = [
            f"{a.key}: {', '.join(a.paths or ['*'])} / {', '.join(a.findings or ['*'])}" for a in cfg.accepts if id(a) not in used_acc
        ]
    report.seconds = time.perf_counter() - t0
    return report


def gate(cfg: Config, *, paths: list[str] | None = None, changed_since: str | None = None,
         baseline: Path | str | None | bool = None, cwd: Path | str | None = None) -> GateReport:
    """Select the files, load the baseline and run. ``baseline``: None uses
    the configured one when the file exists, False uses none, a path must
    exist."""
    changed = changed_files(changed_since, cwd or cfg.root) if changed_since else None
    files, filtered, missing = select_files(cfg, paths, changed, cwd)
    bl = None
    if baseline is None:
        if cfg.baseline_path.is_file():
            bl = Baseline.load(cfg.baseline_path)
        elif cfg.baseline is not None:
            raise GateError(f"the configured baseline {cfg.baseline} does not exist; write it with 'bondcheck baseline write'")
    elif baseline is not False:
        bl = Baseline.load(Path(baseline))
    full = not paths and changed is None
    return run(cfg, files, baseline=bl, full=full, changed_since=changed_since, filtered=filtered, missing=missing)


__all__ = [
    "Baseline", "Checked", "ConfigError", "GateError", "GateReport", "Item", "UnreadableInput",
    "changed_files", "fingerprint", "gate", "run", "select_files", "baseline_entries",
    "EXIT_PASS", "EXIT_FINDINGS", "EXIT_USAGE", "EXIT_UNREADABLE",
]
