"""Project configuration for gating a structure repository.

Settings live in ``bondcheck.toml`` (top-level keys) or in the
``[tool.bondcheck]`` table of ``pyproject.toml``. The first of these found in
the working directory or one of its parents is used; ``--config FILE`` names
one directly. Paths and globs in the file are relative to the folder that
holds it (the *root*).

    paths = ["structures"]            # files or folders to check (default ".")
    include = ["*.cif"]               # globs on the path relative to the root
    exclude = ["structures/drafts/*"]
    fail-on = "warning"               # info | warning | error | never
    unreadable = "fail"               # fail (exit 3) | finding
    baseline = "bondcheck-baseline.json"
    anions = ["Sb"]                   # default split (omit: chosen by electronegativity)
    valence = { Eu = 2 }

    [criterion]                       # bond criterion, see bondcheck.bonds
    core = 1.15
    maximum = 1.30
    relative = 1.12

    [[override]]                      # per-file settings, later entries win
    paths = ["structures/zintl/*"]
    anions = ["Ga", "Ge"]

    [[accept]]                        # known exceptions; reason is mandatory
    paths = ["structures/metals/*"]
    findings = ["electron-excess"]
    reason = "elemental metals: the 8-N rule does not apply"

Globs follow :mod:`fnmatch` (``*`` also crosses ``/``). Unknown keys and bad
values raise :class:`ConfigError` naming the key.
"""
from __future__ import annotations

import difflib
import fnmatch
import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

CONFIG_NAME = "bondcheck.toml"
PYPROJECT = "pyproject.toml"
DEFAULT_BASELINE = "bondcheck-baseline.json"
FAIL_LEVELS = ("info", "warning", "error", "never")
UNREADABLE_MODES = ("fail", "finding")

_TOP_KEYS = (
    "paths", "include", "exclude", "fail-on", "unreadable", "baseline",
    "anions", "valence", "criterion", "override", "accept",
)
_CRITERION_KEYS = ("core", "maximum", "relative")
_OVERRIDE_KEYS = ("paths", "anions", "valence", "criterion")
_ACCEPT_KEYS = ("paths", "findings", "reason")


class ConfigError(ValueError):
    """A configuration problem; the message names the file and the key."""


@dataclass(slots=True)
class Override:
    paths: list[str]
    anions: list[str] | None = None
    valence: dict[str, int] | None = None
    criterion: dict[str, float] | None = None


@dataclass(slots=True)
class Acceptance:
    """A known exception: findings in matching files that never fail the run."""

    reason: str
    paths: list[str] | None = None
    findings: list[str] | None = None
    key: str = ""  # where it was declared, e.g. "accept[2]"

    def matches(self, file: str, structure: str, slug: str) -> bool:
        if self.findings is not None and slug not in self.findings:
            return False
        if self.paths is None:
            return True
        return _match_any(file, self.paths) or _match_any(f"{file}#{structure}", self.paths)


@dataclass(slots=True)
class Config:
    root: Path
    source: Path | None = None
    paths: list[str] = field(default_factory=lambda: ["."])
    include: list[str] = field(default_factory=list)
    exclude: list[str] = field(default_factory=list)
    fail_on: str = "warning"
    unreadable: str = "fail"
    baseline: Path | None = None
    anions: list[str] | None = None
    valence: dict[str, int] = field(default_factory=dict)
    criterion: dict[str, float] = field(default_factory=dict)
    overrides: list[Override] = field(default_factory=list)
    accepts: list[Acceptance] = field(default_factory=list)

    @property
    def baseline_path(self) -> Path:
        return self.baseline if self.baseline is not None else self.root / DEFAULT_BASELINE

    def relative(self, path: Path | str) -> str:
        """Path relative to the root in posix form (absolute when outside it)."""
        p = Path(os.path.abspath(path))
        try:
            return p.relative_to(Path(os.path.abspath(self.root))).as_posix()
        except ValueError:
            return p.as_posix()

    def selected(self, rel: str) -> bool:
        if self.include and not _match_any(rel, self.include):
            return False
        return not (self.exclude and _match_any(rel, self.exclude))

    def options_for(self, rel: str):
        """api.Options for one file: the defaults, then each matching override."""
        from .api import Options
        from .bonds import Criterion

        anions = list(self.anions) if self.anions else None
        valence = dict(self.valence)
        crit = dict(self.criterion)
        for ov in self.overrides:
            if not _match_any(rel, ov.paths):
                continue
            if ov.anions is not None:
                anions = list(ov.anions)
            if ov.valence is not None:
                valence.update(ov.valence)
            if ov.criterion is not None:
                crit.update(ov.criterion)
        return Options(anions=anions, valence=valence, criterion=Criterion(**crit))

    def acceptance(self, rel: str, structure: str, slug: str) -> Acceptance | None:
        for acc in self.accepts:
            if acc.matches(rel, structure, slug):
                return acc
        return None

    def describe(self) -> str:
        return str(self.source) if self.source else "defaults (no configuration file)"


def _match_any(rel: str, globs: list[str]) -> bool:
    return any(fnmatch.fnmatchcase(rel, g) or fnmatch.fnmatchcase(rel, g.rstrip("/") + "/*") for g in globs)


# --------------------------------------------------------------------------
# discovery and loading


def discover(start: Path | str | None = None) -> Path | None:
    """The nearest bondcheck.toml, or pyproject.toml with [tool.bondcheck],
    in ``start`` or one of its parents."""
    here = Path(os.path.abspath(start or os.getcwd()))
    for d in (here, *here.parents):
        cand = d / CONFIG_NAME
        if cand.is_file():
            return cand
        py = d / PYPROJECT
        if py.is_file() and _has_tool_table(py):
            return py
    return None


def _has_tool_table(path: Path) -> bool:
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError):
        return False
    return isinstance(data.get("tool"), dict) and "bondcheck" in data["tool"]


def load(path: Path | str | None = None, *, start: Path | str | None = None) -> Config:
    """Read the named file, or discover one upward from ``start`` (default:
    the working directory). No file found gives the defaults, rooted at
    ``start``."""
    if path is None:
        path = discover(start)
        if path is None:
            return Config(root=Path(os.path.abspath(start or os.getcwd())))
    path = Path(os.path.abspath(path))
    where = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{where}: no such configuration file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{where}: cannot read the configuration file: {exc}") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{where}: invalid TOML: {exc}") from None
    if path.name == PYPROJECT:
        tool = data.get("tool")
        if not isinstance(tool, dict) or "bondcheck" not in tool:
            raise ConfigError(f"{where}: no [tool.bondcheck] table")
        data = tool["bondcheck"]
        where = f"{where} [tool.bondcheck]"
        if not isinstance(data, dict):
            raise ConfigError(f"{where}: tool.bondcheck must be a table")
    return parse(data, root=path.parent, source=path, where=where)


def parse(data: dict[str, Any], *, root: Path, source: Path | None = None, where: str = "configuration") -> Config:
    """Validate a configuration table (already parsed from TOML)."""
    p = _Parser(where)
    p.keys(data, _TOP_KEYS, "")
    cfg = Config(root=root, source=source)
    if "paths" in data:
        cfg.paths = p.strings(data["paths"], "paths", nonempty=True)
        for entry in cfg.paths:
            if not (root / entry).exists():
                p.fail("paths", f"{entry!r} does not exist (relative to {root})")
    if "include" in data:
        cfg.include = p.strings(data["include"], "include")
    if "exclude" in data:
        cfg.exclude = p.strings(data["exclude"], "exclude")
    if "fail-on" in data:
        cfg.fail_on = p.choice(data["fail-on"], "fail-on", FAIL_LEVELS)
    if "unreadable" in data:
        cfg.unreadable = p.choice(data["unreadable"], "unreadable", UNREADABLE_MODES)
    if "baseline" in data:
        b = p.string(data["baseline"], "baseline")
        cfg.baseline = root / b
    if "anions" in data:
        cfg.anions = p.elements(data["anions"], "anions")
    if "valence" in data:
        cfg.valence = p.valence(data["valence"], "valence")
    if "criterion" in data:
        cfg.criterion = p.criterion(data["criterion"], "criterion")
    if "override" in data:
        for k, (key, ov) in enumerate(p.tables(data["override"], "override")):
            p.keys(ov, _OVERRIDE_KEYS, key)
            if "paths" not in ov:
                p.fail(f"{key}.paths", "missing: an override needs the files it applies to")
            o = Override(paths=p.strings(ov["paths"], f"{key}.paths", nonempty=True))
            if "anions" in ov:
                o.anions = p.elements(ov["anions"], f"{key}.anions")
            if "valence" in ov:
                o.valence = p.valence(ov["valence"], f"{key}.valence")
            if "criterion" in ov:
                o.criterion = p.criterion(ov["criterion"], f"{key}.criterion", base=cfg.criterion)
            cfg.overrides.append(o)
    if "accept" in data:
        from .findings import all_findings

        known = set(all_findings()) | {"unreadable-input"}
        for key, acc in p.tables(data["accept"], "accept"):
            p.keys(acc, _ACCEPT_KEYS, key)
            reason = acc.get("reason")
            if reason is None:
                p.fail(f"{key}.reason", "missing: every acceptance needs a reason")
            reason = p.string(reason, f"{key}.reason").strip()
            if not reason:
                p.fail(f"{key}.reason", "empty: every acceptance needs a reason")
            a = Acceptance(reason=reason, key=key)
            if "paths" in acc:
                a.paths = p.strings(acc["paths"], f"{key}.paths", nonempty=True)
            if "findings" in acc:
                a.findings = p.strings(acc["findings"], f"{key}.findings", nonempty=True)
                for slug in a.findings:
                    if slug not in known:
                        hint = difflib.get_close_matches(slug, sorted(known), n=1)
                        more = f" (did you mean {hint[0]!r}?)" if hint else "; 'bondcheck explain' lists them"
                        p.fail(f"{key}.findings", f"no finding called {slug!r}{more}")
            if a.paths is None and a.findings is None:
                p.fail(key, "needs paths, findings or both (an acceptance of everything everywhere would switch the gate off)")
            cfg.accepts.append(a)
    return cfg


class _Parser:
    def __init__(self, where: str):
        self.where = where

    def fail(self, key: str, problem: str):
        raise ConfigError(f"{self.where}: {key}: {problem}")

    def keys(self, table: dict, allowed: tuple[str, ...], prefix: str) -> None:
        for k in table:
            if k not in allowed:
                hint = difflib.get_close_matches(k.replace("_", "-"), allowed, n=1)
                more = f" (did you mean {hint[0]!r}?)" if hint else f"; known keys: {', '.join(allowed)}"
                self.fail(f"{prefix}.{k}" if prefix else k, f"unknown key{more}")

    def string(self, v, key: str) -> str:
        if not isinstance(v, str):
            self.fail(key, f"expected a string, got {_kind(v)}")
        return v

    def strings(self, v, key: str, nonempty: bool = False) -> list[str]:
        if isinstance(v, str):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            self.fail(key, f"expected a list of strings, got {_kind(v)}")
        if nonempty and not v:
            self.fail(key, "is empty")
        return list(v)

    def choice(self, v, key: str, allowed: tuple[str, ...]) -> str:
        if not isinstance(v, str) or v not in allowed:
            self.fail(key, f"expected one of {', '.join(allowed)}; got {v!r}")
        return v

    def elements(self, v, key: str) -> list[str]:
        from . import elements

        syms = self.strings(v, key, nonempty=True)
        known = elements.numbers()
        for s in syms:
            if s not in known:
                self.fail(key, f"unknown element {s!r}")
        return syms

    def valence(self, v, key: str) -> dict[str, int]:
        from . import elements

        if not isinstance(v, dict):
            self.fail(key, f"expected a table of element = electrons, e.g. {{ Eu = 2 }}; got {_kind(v)}")
        known = elements.numbers()
        out = {}
        for el, n in v.items():
            if el not in known:
                self.fail(f"{key}.{el}", "unknown element")
            if isinstance(n, bool) or not isinstance(n, int) or not 0 <= n <= 18:
                self.fail(f"{key}.{el}", f"expected a whole number of valence electrons from 0 to 18, got {n!r}")
            out[el] = n
        return out

    def criterion(self, v, key: str, base: dict[str, float] | None = None) -> dict[str, float]:
        from .bonds import Criterion

        if not isinstance(v, dict):
            self.fail(key, f"expected a table with {', '.join(_CRITERION_KEYS)}; got {_kind(v)}")
        self.keys(v, _CRITERION_KEYS, key)
        out = {}
        for k, x in v.items():
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not 0.5 <= float(x) <= 2.0:
                self.fail(f"{key}.{k}", f"expected a ratio to the sum of covalent radii between 0.5 and 2, got {x!r}")
            out[k] = float(x)
        merged = {**{k: getattr(Criterion(), k) for k in _CRITERION_KEYS}, **(base or {}), **out}
        if merged["core"] > merged["maximum"]:
            self.fail(f"{key}.core", f"core ({merged['core']:g}) exceeds maximum ({merged['maximum']:g})")
        if merged["relative"] < 1.0:
            self.fail(f"{key}.relative", f"must be at least 1, got {merged['relative']:g}")
        return out

    def tables(self, v, key: str):
        if isinstance(v, dict):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
            self.fail(key, f"expected [[{key}]] tables, got {_kind(v)}")
        return [(f"{key}[{k + 1}]", t) for k, t in enumerate(v)]


def _kind(v) -> str:
    if isinstance(v, bool):
        return f"a boolean ({str(v).lower()})"
    if isinstance(v, (int, float)):
        return f"a number ({v})"
    if isinstance(v, str):
        return f"a string ({v!r})"
    if isinstance(v, list):
        return "a list"
    if isinstance(v, dict):
        return "a table"
    return type(v).__name__
