"""SARIF 2.1.0 log of a gate run, for code-scanning views of CI systems.

One rule per finding type, described from its explanation (the text of
``bondcheck explain SLUG``). One result per finding at or above the report
level; accepted findings and findings held by the baseline carry an external
suppression with its justification, so code-scanning views keep them quiet.
Findings that left the baseline are not results (they are listed in the text,
Markdown and JSON reports).
"""
from __future__ import annotations

import hashlib
import json
import math
import re
from pathlib import Path
from urllib.parse import quote

SARIF_VERSION = "2.1.0"
SARIF_SCHEMA = "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json"
LEVELS = {"info": "note", "warning": "warning", "error": "error"}
ROOT_ID = "SRCROOT"


def rules() -> list[dict]:
    """reportingDescriptor objects for every finding type, sorted by slug."""
    from ..findings import all_findings
    from ..gate import GATE_FINDINGS

    classes = dict(all_findings())
    for cls in GATE_FINDINGS:
        classes.setdefault(cls.slug, cls)
    out = []
    for slug in sorted(classes):
        cls = classes[slug]
        help_text = f"{cls.meaning}\n\nWhen it fires: {cls.fires_when}\n\nWhat to check next: {cls.next_steps}"
        help_md = f"{cls.meaning}\n\n**When it fires:** {cls.fires_when}\n\n**What to check next:** {cls.next_steps}"
        out.append(
            {
                "id": slug,
                "name": "".join(w.capitalize() for w in re.split(r"[^A-Za-z0-9]+", slug) if w),
                "shortDescription": {"text": cls.title or slug},
                "fullDescription": {"text": cls.meaning or cls.title or slug},
                "help": {"text": help_text, "markdown": help_md},
                "defaultConfiguration": {"level": LEVELS.get(cls.severity, "note")},
                "properties": {"tags": ["crystal-structure", "electron-count"], "severity": cls.severity},
            }
        )
    return out


def site_lines(path: str, structure: str, labels: list[str]) -> tuple[int, dict[str, int]]:
    """Line of the structure's data_ block and of each site label's row in
    the atom-site loop of a CIF (1-based; empty when not found)."""
    try:
        text = Path(path).read_text(encoding="utf-8", errors="replace")
    except OSError:
        return 1, {}
    want = set(labels)
    found: dict[str, int] = {}
    block_line = 0
    in_block = False
    in_sites = False
    single = text.lower().count("data_") <= 1
    for n, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        low = line.lower()
        if low.startswith("data_"):
            if in_block and not single:
                break
            in_block = single or line[5:].strip().lower() == structure.lower()
            if in_block and not block_line:
                block_line = n
            in_sites = False
            continue
        if not in_block:
            continue
        if low == "loop_":
            in_sites = False
        elif low in ("_atom_site_label", "_atom_site.label"):
            in_sites = True
        elif in_sites and line and not line.startswith(("_", "#")):
            tokens = line.split()
            for tok in tokens:
                if tok in want and tok not in found:
                    found[tok] = n
            if len(found) == len(want):
                break
    return block_line or 1, found


def _uri(rel: str) -> str:
    return quote(rel, safe="/:")


def _result(c, item, rule_index: dict[str, int], baseline_used: bool, block_line: int, lines: dict[str, int]) -> dict:
    line = min((lines[s] for s in item.sites if s in lines), default=block_line)
    where = f" [sites: {', '.join(item.sites)}]" if item.sites else ""
    res = {
        "ruleId": item.slug,
        "level": LEVELS.get(item.severity, "note"),
        "message": {"text": f"{c.structure}: {item.message}{where}"},
        "locations": [
            {
                "physicalLocation": {
                    "artifactLocation": {"uri": _uri(c.file), "uriBaseId": ROOT_ID},
                    "region": {"startLine": int(line)},
                },
                "logicalLocations": [{"name": c.structure, "kind": "module"}]
                + [{"name": s, "fullyQualifiedName": f"{c.structure}/{s}", "kind": "member"} for s in item.sites],
            }
        ],
        "partialFingerprints": {
            "bondcheckFinding/v1": hashlib.sha256(
                "\n".join([c.fingerprint, item.slug, *sorted(item.sites)]).encode()
            ).hexdigest()
        },
        "properties": {
            "structure": c.structure,
            "fingerprint": c.fingerprint,
            "sites": item.sites,
            "evidence": _clean(item.evidence),
            "state": item.state,
        },
    }
    if item.slug in rule_index:
        res["ruleIndex"] = rule_index[item.slug]
    if baseline_used:
        res["baselineState"] = "unchanged" if item.state == "baseline" else "new"
    if item.state == "accepted":
        res["suppressions"] = [{"kind": "external", "status": "accepted", "justification": item.reason}]
    elif item.state == "baseline":
        res["suppressions"] = [
            {"kind": "external", "status": "accepted", "justification": f"recorded in the baseline {item.reason}".strip()}
        ]
    return res


def to_sarif(report) -> dict:
    from .. import __version__

    rs = rules()
    rule_index = {r["id"]: k for k, r in enumerate(rs)}
    baseline_used = report.baseline_file is not None
    results = []
    for c in report.checked:
        if not c.items:
            continue
        labels = sorted({s for i in c.items for s in i.sites})
        block_line, lines = site_lines(c.path, c.structure, labels)
        results.extend(_result(c, i, rule_index, baseline_used, block_line, lines) for i in c.items)
    notes = []
    for c in report.unreadable:
        notes.append(
            {
                "level": "error",
                "message": {"text": f"{c.file}: {c.error}"},
                "locations": [{"physicalLocation": {"artifactLocation": {"uri": _uri(c.file), "uriBaseId": ROOT_ID}}}],
            }
        )
    code = report.exit_code
    root_uri = Path(report.root).resolve().as_uri().rstrip("/") + "/"
    run = {
        "tool": {
            "driver": {
                "name": "bondcheck",
                "version": __version__,
                "semanticVersion": __version__,
                "rules": rs,
            }
        },
        "invocations": [
            {
                "executionSuccessful": code in (0, 1),
                "exitCode": code,
                "toolExecutionNotifications": notes,
                "properties": {
                    "failOn": report.fail_on,
                    "changedSince": report.changed_since,
                    "configuration": report.config,
                    "baseline": report.baseline_file,
                },
            }
        ],
        "originalUriBaseIds": {ROOT_ID: {"uri": root_uri}},
        "columnKind": "unicodeCodePoints",
        "results": results,
    }
    return {"$schema": SARIF_SCHEMA, "version": SARIF_VERSION, "runs": [run]}


def _clean(x):
    """JSON-safe copy: non-finite numbers become null."""
    if isinstance(x, float):
        return x if math.isfinite(x) else None
    if isinstance(x, dict):
        return {str(k): _clean(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_clean(v) for v in x]
    if isinstance(x, (str, int, bool)) or x is None:
        return x
    try:
        return _clean(x.item())  # numpy scalars
    except AttributeError:
        return str(x)


def render(report) -> str:
    return json.dumps(to_sarif(report), indent=2, allow_nan=False) + "\n"
