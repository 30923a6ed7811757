"""JUnit XML of a gate run: one test case per structure.

A structure with a failing finding is a <failure>; a file that could not be
read or checked is an <error> (or a <failure> when unreadable inputs are
findings); accepted and baseline findings appear in <system-out> only.
classname is the file (relative to the root), name the structure.
"""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

_BAD_XML = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\ufffe\uffff]")


def _t(s) -> str:
    return _BAD_XML.sub("?", str(s))


def _line(c, i) -> str:
    where = f" ({', '.join(i.sites)})" if i.sites else ""
    note = {"new": "", "accepted": f"  [accepted: {i.reason}]", "baseline": "  [in the baseline]"}[i.state]
    return f"{i.severity} {i.slug}: {i.message}{where}{note}"


def to_element(report) -> ET.Element:
    from .text import CAUTION

    cases = []
    failures = errors = 0
    total_time = 0.0
    for c in report.checked:
        tc = ET.Element(
            "testcase",
            {"classname": _t(c.file), "name": _t(c.structure), "file": _t(c.file), "time": f"{c.seconds:.4f}"},
        )
        total_time += c.seconds
        failing = [i for i in c.items if i.failing]
        if c.unreadable and report.unreadable_mode == "fail":
            errors += 1
            err = ET.SubElement(tc, "error", {"type": "unreadable-input", "message": _t(c.error)})
            err.text = _t(f"{c.path}: {c.error}")
        elif failing:
            failures += 1
            first = failing[0]
            msg = f"{len(failing)} new finding(s) at or above {report.fail_on}: " + "; ".join(f"{i.slug}: {i.message}" for i in failing)
            fail = ET.SubElement(tc, "failure", {"type": first.slug, "message": _t(msg)})
            fail.text = _t("\n".join(_line(c, i) for i in failing))
        lines = []
        r = c.result
        if r is not None and getattr(r, "status", "") == "ok":
            lines.append(f"{r.formula}  space group {r.spacegroup}  verdict {r.verdict}")
        lines.extend(_line(c, i) for i in c.items)
        if lines:
            ET.SubElement(tc, "system-out").text = _t("\n".join(lines))
        cases.append(tc)

    attrs = {
        "name": "bondcheck gate",
        "tests": str(len(cases)),
        "failures": str(failures),
        "errors": str(errors),
        "skipped": "0",
        "time": f"{total_time:.4f}",
    }
    root = ET.Element("testsuites", attrs)
    suite = ET.SubElement(root, "testsuite", attrs)
    props = ET.SubElement(suite, "properties")
    for k, v in (
        ("fail-on", report.fail_on),
        ("configuration", report.config),
        ("baseline", report.baseline_file or ""),
        ("changed-since", report.changed_since or ""),
        ("caution", CAUTION),
    ):
        ET.SubElement(props, "property", {"name": k, "value": _t(v)})
    suite.extend(cases)
    return root


def render(report) -> str:
    root = to_element(report)
    ET.indent(root)
    return '<?xml version="1.0" encoding="UTF-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"
