"""Self-contained HTML report: one file, no network, readable on a laptop and
printable.

Input is a list of `Entry`: a result row (the dict of `Result.to_dict()`, or
a row of a scan results file with the same keys) and, where the structure was
at hand, the `plots.Detail` the figures are drawn from. With more than one
entry the page opens with a summary: counts by verdict and cause, the scatter
of observed anion-anion bonds against VEC per anion, and a sortable,
filterable table linking to each entry's section.

A Content-Security-Policy meta tag forbids every fetch, so the page cannot
reach the network even if a figure carried a stray reference.
"""
from __future__ import annotations

import html
import json
import math
from dataclasses import dataclass
from typing import Iterable

from .text import CAUTION

VERDICT_ORDER = ("mismatch", "consistent", "not-applicable", "error")
_MARK = {"consistent": "\u2713", "mismatch": "\u2717", "not-applicable": "\u2013", "error": "!"}
_TITLE = {"consistent": "Consistent", "mismatch": "Mismatch", "not-applicable": "Not applicable", "error": "Not checked"}

NUM_CLASS = ' class="num"'
CSP = "default-src 'none'; style-src 'unsafe-inline'; script-src 'unsafe-inline'; img-src data:; base-uri 'none'; form-action 'none'"


@dataclass(slots=True)
class Entry:
    row: dict
    detail: object | None = None  # plots.Detail
    note: str = ""


def esc(x) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def _f(x, nd: int = 3) -> str:
    if not _finite(x):
        return "\u2013" if x is None or x == "" else esc(x)
    x = float(x)
    if abs(x - round(x)) < 1e-9 and abs(x) < 1e9:
        return str(int(round(x)))
    return f"{x:.{nd}f}".rstrip("0").rstrip(".")


def _verdict_key(row: dict) -> str:
    if row.get("status", "ok") != "ok":
        return "error"
    v = row.get("verdict")
    return v if v in ("consistent", "mismatch", "not-applicable") else "error"


def entry_name(row: dict) -> str:
    name = row.get("name") or ""
    path = str(row.get("entry") or row.get("id") or row.get("path") or "")
    if not name:
        name = path.rsplit("/", 1)[-1] or "(unnamed)"
    return name


def _findings(row: dict) -> list[dict]:
    out = []
    for f in row.get("findings") or []:
        if hasattr(f, "to_dict"):
            f = f.to_dict()
        if isinstance(f, dict):
            out.append(f)
    return out


# --------------------------------------------------------------------------
# Page


SECTION_RANK = {"error": 0, "mismatch": 1, "not-applicable": 2, "consistent": 3}


def render(entries: Iterable[Entry], title: str = "bondcheck report", settings: str = "", max_sections: int | None = None) -> str:
    """The whole page as one string. With more than `max_sections` entries,
    only that many get a section (entries with figures, then errors,
    mismatches, not applicable, consistent; input order within each); the
    others are rows of the table and points of the scatter only."""
    from .. import __version__

    entries = list(entries)
    order = sorted(range(len(entries)), key=lambda n: (entries[n].detail is None, SECTION_RANK[_verdict_key(entries[n].row)], n))
    keep = set(order if max_sections is None or len(entries) <= 1 else order[:max_sections])
    anchors = [f"e{n + 1}" if n in keep else None for n in range(len(entries))]
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="bondcheck {esc(__version__)}">',
        f"<title>{esc(title)}</title>",
        f"<style>{CSS}</style>",
        "</head>",
        "<body>",
        '<header class="page">',
        f"<h1>{esc(title)}</h1>",
        f'<p class="meta">{len(entries)} structure{"s" if len(entries) != 1 else ""} \u00b7 bondcheck {esc(__version__)}'
        + (f' \u00b7 settings <code>{esc(settings)}</code>' if settings else "")
        + "</p>",
        f'<p class="caution" role="note"><strong>Caution.</strong> {esc(CAUTION)}</p>',
        "</header>",
        "<main>",
    ]
    if len(entries) > 1:
        parts.append(_summary(entries, anchors))
    for entry, anchor in zip(entries, anchors):
        if anchor is not None:
            parts.append(_section(entry, anchor, back=len(entries) > 1))
    parts += [
        "</main>",
        '<footer class="page">',
        "<h2>How to read this report</h2>",
        "<p>VEC per anion is the number of valence electrons in the formula (cations and anions together) divided by the number "
        "of anions. The generalized 8\u2212N rule says 8 \u2212 VEC = AA \u2212 CC: with VEC electrons per anion, each anion completes "
        "its octet by AA bonds to other anions, unless CC electrons per anion stay on the cations (cation\u2013cation bonds, lone "
        "pairs, nonbonding d electrons). The residual VEC \u2212 8 + AA \u2212 CC is what the observed bonds leave unexplained, in "
        "electrons per anion; a count closes when the electrons the cations can keep at their usual oxidation states (and "
        "\u03c0 bonds, where the geometry allows them) take it up.</p>",
        "<p>A contact is a pair of atoms with ratio d/(r<sub>i</sub> + r<sub>j</sub>) up to 1.45, d the distance and r the "
        "covalent radii (Cordero et al., Dalton Trans. 2008, 2832). Whether a contact counts as a bond is the bond criterion "
        "drawn in each contact plot.</p>",
        f"<p>{esc(CAUTION)}</p>",
        "</footer>",
        f"<script>{JS}</script>",
        "</body>",
        "</html>",
    ]
    return "\n".join(parts) + "\n"


# --------------------------------------------------------------------------
# Summary of many entries


def _summary(entries: list[Entry], anchors: list[str]) -> str:
    from ..findings import lookup
    from . import plots

    rows = [e.row for e in entries]
    names = [entry_name(r) for r in rows]
    tally: dict[str, int] = {}
    causes: dict[str, int] = {}
    for r in rows:
        k = _verdict_key(r)
        tally[k] = tally.get(k, 0) + 1
        for c in r.get("causes") or []:
            causes[c] = causes.get(c, 0) + 1
    out = ['<section class="summary" id="summary" aria-labelledby="summary-h">', '<h2 id="summary-h">Summary</h2>', '<div class="counts">']
    out.append('<table class="tally"><caption>Entries by verdict</caption><thead><tr><th scope="col">verdict</th><th scope="col" class="num">entries</th></tr></thead><tbody>')
    for k in VERDICT_ORDER:
        if k in tally:
            out.append(
                f'<tr class="v-{k}"><td><button type="button" class="linkish" data-verdict="{k}">'
                f'<span class="mark" aria-hidden="true">{_MARK[k]}</span> {esc(_TITLE[k].lower())}</button></td><td class="num">{tally[k]}</td></tr>'
            )
    out.append(f'</tbody><tfoot><tr><th scope="row">all</th><td class="num">{len(rows)}</td></tr></tfoot></table>')
    if causes:
        out.append('<table class="tally"><caption>Entries by cause</caption><thead><tr><th scope="col">cause</th><th scope="col">meaning</th><th scope="col" class="num">entries</th></tr></thead><tbody>')
        for c, n in sorted(causes.items(), key=lambda t: (-t[1], t[0])):
            cls = lookup(c)
            out.append(
                f'<tr><td><button type="button" class="linkish" data-filter="{esc(c)}"><code>{esc(c)}</code></button></td>'
                f'<td>{esc(cls.title if cls else "")}</td><td class="num">{n}</td></tr>'
            )
        out.append("</tbody></table>")
    out.append("</div>")

    pts = plots.scatter_points(rows)
    svg, box = plots.scatter_plot(rows, anchors, names)
    island = [
        {"anchor": anchors[p["entry"]], "name": names[p["entry"]], "vec_anion": p["vec_anion"], "aa_observed": p["aa_observed"], "verdict": p["verdict"]}
        for p in pts
    ]
    missing = len(rows) - len(pts)
    out.append(
        f'<figure class="plot scatter" id="scatter" data-axes="{esc(json.dumps(box))}">{svg}'
        "<figcaption>Observed anion\u2013anion bonds per anion against VEC per anion, one point per entry "
        f"({len(pts)} placed"
        + (f"; {missing} without an anion count are left out" if missing else "")
        + "). The line is the 8\u2212N rule with no electrons kept on cations; entries below it keep electrons on cations "
        "(lone pairs, d electrons, cation\u2013cation bonds), entries above it are short of electrons. Circles: consistent; "
        "triangles: mismatch; diamonds: not applicable. Each point links to its entry.</figcaption></figure>"
    )
    out.append(f'<script type="application/json" id="bondcheck-points">{_json_island(island)}</script>')
    hidden = sum(a is None for a in anchors)
    if hidden:
        out.append(
            f'<p class="note">{hidden} of {len(rows)} entries are rows of the table and points of the scatter only, without a '
            "section of their own (--max-sections); the sections kept are those with figures, then errors, mismatches, "
            "entries with nothing to count, and consistent ones.</p>"
        )
    out.append(_entries_table(entries, anchors, names))
    out.append("</section>")
    return "\n".join(out)


def _json_island(data) -> str:
    return json.dumps(data, allow_nan=False).replace("</", "<\\/")


def _entries_table(entries: list[Entry], anchors: list[str], names: list[str]) -> str:
    cols = [
        ("#", "num"),
        ("entry", "text"),
        ("formula", "text"),
        ("space group", "text"),
        ("verdict", "text"),
        ("causes", "text"),
        ("VEC per anion", "num"),
        ("AA predicted", "num"),
        ("AA observed", "num"),
        ("residual (e\u207b/anion)", "num"),
    ]
    out = [
        '<div class="filters" role="search">',
        '<label for="filter-text">Filter</label> <input type="search" id="filter-text" placeholder="name, formula, cause\u2026" autocomplete="off">',
        '<label for="filter-verdict">verdict</label> <select id="filter-verdict"><option value="">any</option>'
        + "".join(f'<option value="{k}">{esc(_TITLE[k].lower())}</option>' for k in VERDICT_ORDER)
        + "</select>",
        f'<output id="filter-count" for="filter-text filter-verdict" aria-live="polite">{len(entries)} of {len(entries)} entries shown</output>',
        "</div>",
        '<div class="scroll"><table class="entries" id="entries"><caption>Entries (click a column heading to sort)</caption><thead><tr>',
    ]
    for k, (h, kind) in enumerate(cols):
        out.append(f'<th scope="col" data-kind="{kind}" aria-sort="none"><button type="button">{esc(h)}</button></th>')
    out.append("</tr></thead><tbody>")
    for n, (e, a, name) in enumerate(zip(entries, anchors, names)):
        r = e.row
        v = _verdict_key(r)
        cells = [
            (n + 1, str(n + 1)),
            (name.lower(), f'<a href="#{a}">{esc(name)}</a>' if a else esc(name)),
            (r.get("formula") or "", esc(r.get("formula") or "")),
            (r.get("spacegroup") or "", esc(r.get("spacegroup") or "")),
            (v, f'<span class="mark" aria-hidden="true">{_MARK[v]}</span> {esc(_TITLE[v].lower())}'),
            (" ".join(r.get("causes") or []), esc(", ".join(r.get("causes") or []))),
        ]
        for key in ("vec_anion", "aa_predicted", "aa_observed", "residual"):
            x = r.get(key)
            cells.append((float(x) if _finite(x) else "", _f(x)))
        tds = "".join(f'<td data-sort="{esc(s)}">{h}</td>' for s, h in cells)
        out.append(f'<tr class="v-{v}" data-verdict="{v}">{tds}</tr>')
    out.append("</tbody></table></div>")
    return "\n".join(out)


# --------------------------------------------------------------------------
# One structure


def _section(entry: Entry, anchor: str, back: bool) -> str:
    r = entry.row
    v = _verdict_key(r)
    name = entry_name(r)
    head = [f'<section class="structure v-{v}" id="{anchor}" aria-labelledby="{anchor}-h">']
    sub = " \u00b7 ".join(x for x in (esc(r.get("formula")), f"space group {esc(r.get('spacegroup'))}" if r.get("spacegroup") else "") if x)
    head.append(f'<h2 id="{anchor}-h">{esc(name)}' + (f' <span class="sub">{sub}</span>' if sub else "") + "</h2>")
    path = r.get("path") or r.get("entry") or r.get("id")
    if path:
        head.append(f'<p class="path">{esc(path)}</p>')
    head.append(_banner(r, v))
    if entry.note:
        head.append(f'<p class="note">{esc(entry.note)}</p>')
    body = []
    if v != "error":
        body.append(_count_steps(r, entry.detail))
        body.append(_sites_table(r))
        body.append(_findings_list(r))
        if entry.detail is not None and getattr(entry.detail, "cell", None) is not None:
            body.append(_figures(entry.detail, anchor))
    if back:
        body.append('<p class="back"><a href="#summary">back to the summary</a></p>')
    return "\n".join(head + body + ["</section>"])


def _banner(r: dict, v: str) -> str:
    finds = _findings(r)
    causes = set(r.get("causes") or [])
    if v == "error":
        words = f"This entry could not be checked ({esc(r.get('status', 'error'))}): {esc(r.get('error') or 'no reason given')}."
    elif v == "consistent":
        why = [f["message"] for f in finds if f.get("slug") in causes]
        words = "The electron count closes: the bonds found account for every valence electron."
        if why:
            words += " " + " ".join(esc(_sentence(w)) for w in why)
    elif v == "mismatch":
        words = "The electron count does not close."
        rank = {"error": 0, "warning": 1}
        why = [f["message"] for f in sorted(finds, key=lambda f: rank.get(f.get("severity"), 2)) if f.get("slug") in causes]
        res = r.get("residual")
        if why:
            words += " " + " ".join(esc(_sentence(w)) for w in why)
        elif _finite(res) and float(res) > 0:
            words += f" {_f(res)} electrons per anion are left over."
        elif _finite(res):
            words += f" {_f(-float(res))} electrons per anion are missing."
    else:
        why = [f["message"] for f in finds if f.get("slug") in causes]
        words = "Nothing to count." + ("".join(" " + esc(_sentence(w)) for w in why))
    return (
        f'<div class="banner v-{v}" role="status"><span class="mark" aria-hidden="true">{_MARK[v]}</span> '
        f"<strong>{_TITLE[v]}.</strong> {words}</div>"
    )


def _sentence(text: str) -> str:
    text = str(text).strip()
    if not text:
        return ""
    text = text[0].upper() + text[1:]
    return text if text.endswith((".", "!", "?")) else text + "."


def _count_steps(r: dict, det) -> str:
    if not r.get("anions"):
        return ""
    vec, aap, aao, cc, res = (r.get(k) for k in ("vec_anion", "aa_predicted", "aa_observed", "cc_observed", "residual"))
    shell = float(aap) + float(vec) if _finite(aap) and _finite(vec) else 8.0
    shell_s = _f(round(shell, 3))
    out = ['<div class="count"><h3>The electron count</h3><ol class="steps">']
    out.append(
        f"<li>Split: cations <b>{esc(' '.join(r.get('cations') or []) or 'none')}</b>, anions <b>{esc(' '.join(r.get('anions') or []))}</b>"
        + (f" <span class=\"why\">({esc(r.get('partition'))})</span>" if r.get("partition") else "")
        + ".</li>"
    )
    out.append(
        f"<li>VEC per anion = {_f(r.get('electrons_per_formula'))} valence electrons per formula / "
        f"{_f(r.get('anions_per_formula'))} anions per formula = <b>{_f(vec)}</b>.</li>"
    )
    out.append(
        f"<li>The 8\u2212N rule predicts AA = {shell_s} \u2212 VEC = <b>{_f(aap)}</b> anion\u2013anion bonds per anion, "
        "if no electrons stay on the cations."
        + (" (Hydrogen completes its shell at 2, so the mean shell here is not 8.)" if shell_s != "8" else "")
        + "</li>"
    )
    out.append(
        f"<li>Observed: AA = <b>{_f(aao)}</b> anion\u2013anion bonds per anion; CC = <b>{_f(cc)}</b> electrons per anion "
        "in cation\u2013cation bonds.</li>"
    )
    if r.get("polyanion"):
        out.append(f"<li>Anion substructure: {esc(r['polyanion'])}.</li>")
    out.append(
        f"<li>Residual = VEC \u2212 {shell_s} + AA \u2212 CC = {_f(vec)} \u2212 {shell_s} + {_f(aao)} \u2212 {_f(cc)} = "
        f"<b>{_f(res)}</b> electrons per anion"
        + (" left for the cations to keep (or in excess)." if _finite(res) and float(res) > 0.05 else
           " missing (multiple bonds, or an atom missing)." if _finite(res) and float(res) < -0.05 else ".")
        + "</li>"
    )
    out.append(_closure(r, det))
    out.append("</ol></div>")
    return "\n".join(out)


def _closure(r: dict, det) -> str:
    """How the count closes: electrons kept per cation group and pi bonds."""
    v = _verdict_key(r)
    if det is not None and det.kept is not None and det.closes:
        apf = r.get("anions_per_formula")
        kept = [k for k in det.kept if abs(k.per_atom) > 1e-9]
        total = sum(k.per_formula for k in kept)
        rows = "".join(
            f"<tr><td>{esc(k.label)}</td><td>{esc(k.element)}</td><td class=\"num\">{_f(k.per_atom)}</td><td>{esc(k.what)}</td>"
            f"<td class=\"num\">{_f(k.atoms_per_formula)}</td><td class=\"num\">{_f(k.per_formula)}</td></tr>"
            for k in kept
        )
        parts = ["<li>The count closes."]
        if kept:
            parts.append(
                '<table class="kept"><caption>Electrons kept on the cations</caption><thead><tr><th scope="col">site</th>'
                '<th scope="col">element</th><th scope="col" class="num">kept per atom</th><th scope="col">as</th>'
                '<th scope="col" class="num">atoms per formula</th><th scope="col" class="num">per formula</th></tr></thead>'
                f"<tbody>{rows}</tbody></table>"
            )
        else:
            parts.append("<p>No electrons stay on the cations.</p>")
        pi = det.pi_per_formula
        if pi > 1e-9:
            parts.append(f"<p>\u03c0 bonds between anions take {_f(pi)} electrons per formula.</p>")
        if _finite(apf) and _finite(r.get("residual")) and _finite(r.get("cc_observed")):
            rhs = (float(r["residual"]) + float(r["cc_observed"])) * float(apf)
            parts.append(
                f'<p class="balance">Balance per formula: kept {_f(total)}'
                + (f" \u2212 \u03c0 {_f(pi)}" if pi > 1e-9 else "")
                + f" = {_f(total - pi)}; (residual + CC) \u00d7 anions per formula = ({_f(r['residual'])} + {_f(r['cc_observed'])}) "
                f"\u00d7 {_f(apf)} = {_f(rhs)}.</p>"
            )
        parts.append("</li>")
        return "".join(parts)
    finds = [f for f in _findings(r) if f.get("slug") in set(r.get("causes") or [])]
    if v == "consistent":
        if finds:
            return "<li>The count closes: " + "; ".join(esc(f["message"]) for f in finds) + ".</li>"
        return "<li>The count closes as it stands.</li>"
    if v == "mismatch":
        return "<li>No choice of kept electrons at known oxidation states, nor \u03c0 bonds the geometry allows, closes the count.</li>"
    return ""


def _sites_table(r: dict) -> str:
    sites = r.get("sites") or []
    if not sites:
        return ""
    cols = [
        ("site", "label", None),
        ("element", "element", None),
        ("Wyckoff", None, None),
        ("occupancy", "occupancy", 3),
        ("role", "role", None),
        ("bonds", "bonds", 2),
        ("coordination", "coordination", 2),
        ("formal charge", "formal_charge", 2),
        ("nearest", "nearest", 3),
        ("last bonded", "last_bonded", 3),
        ("first not bonded", "first_unbonded", 3),
        ("gap", "gap", 3),
    ]
    out = [
        '<div class="scroll"><table class="sites"><caption>Sites. Bonds: anion\u2013anion bonds of an anion, cation\u2013cation bonds of a cation. '
        "Nearest, last bonded, first not bonded and gap are ratios d/(r<sub>i</sub> + r<sub>j</sub>); "
        "<span aria-hidden=\"true\">*</span> marks a site whose count changes within 3% of the criterion.</caption><thead><tr>"
    ]
    out += [f'<th scope="col"{NUM_CLASS if nd else ""}>{esc(h)}</th>' for h, _, nd in cols]
    out.append("</tr></thead><tbody>")
    for s in sites:
        if not isinstance(s, dict):
            continue
        tds = []
        for h, key, nd in cols:
            if key is None:
                tds.append(f"<td>{esc(s.get('multiplicity') or '')}{esc(s.get('wyckoff') or '') or '&ndash;'}</td>")
            elif nd:
                val = _f(s.get(key), nd)
                if key == "first_unbonded" and s.get("fragile"):
                    val += ' <span title="count fragile">*</span>'
                tds.append(f'<td class="num">{val}</td>')
            else:
                tds.append(f"<td>{esc(s.get(key) if s.get(key) is not None else chr(0x2013))}</td>")
        out.append("<tr>" + "".join(tds) + "</tr>")
    out.append("</tbody></table></div>")
    return "\n".join(out)


def _evidence(ev) -> str:
    if not ev:
        return ""
    if isinstance(ev, dict):
        items = "".join(f"<dt>{esc(k)}</dt><dd>{_evidence_value(v)}</dd>" for k, v in ev.items())
        return f'<dl class="evidence">{items}</dl>'
    return f'<p class="evidence">{_evidence_value(ev)}</p>'


def _evidence_value(v) -> str:
    if isinstance(v, dict):
        return ", ".join(f"{esc(k)} {_evidence_value(x)}" for k, x in v.items())
    if isinstance(v, (list, tuple)):
        return ", ".join(_evidence_value(x) for x in v)
    if isinstance(v, float):
        return _f(v)
    return esc(v)


def _findings_list(r: dict) -> str:
    from ..findings import lookup

    finds = _findings(r)
    if not finds:
        return '<div class="findings"><h3>Findings</h3><p>None.</p></div>'
    out = ['<div class="findings"><h3>Findings</h3><ul>']
    order = {"error": 0, "warning": 1, "info": 2}
    for f in sorted(finds, key=lambda f: order.get(f.get("severity"), 3)):
        sev = f.get("severity", "info")
        slug = f.get("slug", "")
        cls = lookup(slug)
        sites = f.get("sites") or []
        item = [
            f'<li class="sev-{esc(sev)}"><span class="sev">{esc(sev)}</span> <code>{esc(slug)}</code>: {esc(f.get("message", ""))}'
            + (f' <span class="where">(sites {esc(", ".join(map(str, sites)))})</span>' if sites else "")
        ]
        item.append(_evidence(f.get("evidence")))
        if cls is not None and (cls.meaning or cls.next_steps):
            item.append(
                f"<details><summary>What this means</summary><p>{esc(cls.meaning)}</p>"
                + (f"<p><b>What to check next:</b> {esc(cls.next_steps)}</p>" if cls.next_steps else "")
                + "</details>"
            )
        item.append("</li>")
        out.append("".join(item))
    out.append("</ul></div>")
    return "\n".join(out)


def _figures(det, anchor: str) -> str:
    from . import plots

    contact, picture = det.figures or plots.render_figures(det, anchor)
    has_role = det.role is not None
    return "\n".join(
        [
            '<div class="figures">',
            f'<figure class="plot contacts" id="{anchor}-contacts">{contact}<figcaption>Contacts of each site: every neighbour within '
            "1.45 times the sum of covalent radii, as the ratio d/(r<sub>i</sub> + r<sub>j</sub>). Filled markers are counted as bonds, "
            "hollow ones are not; the shape and colour give the kind of pair; \u00d7n marks n equal contacts. The lines are the bond "
            "criterion.</figcaption></figure>",
            f'<figure class="plot substructure" id="{anchor}-picture">{picture}<figcaption>'
            + (
                "The anion substructure: anions coloured by element with their anion\u2013anion bonds, cations as small hollow points, "
                "cation\u2013cation bonds dashed, the unit cell outlined."
                if has_role
                else "No element takes the anion role: all atoms and the counted bonds, the unit cell outlined."
            )
            + "</figcaption></figure>",
            "</div>",
            _viewer(det, anchor),
        ]
    )


def _viewer(det, anchor: str) -> str:
    """A small 3D view of the same substructure, drawn by the page's script
    when opened: drag, or use the arrow keys, to turn it."""
    from . import plots

    model = plots.substructure_model(det)
    if model is None:
        return ""
    return (
        f'<details class="viewer" id="{anchor}-3d"><summary>Turn the substructure in 3D</summary>'
        '<div class="viewer-controls"><button type="button" data-view="a">down a</button> '
        '<button type="button" data-view="b">down b</button> <button type="button" data-view="c">down c</button> '
        '<span class="hint">drag, or focus the picture and use the arrow keys</span></div>'
        f'<div class="viewer-box" data-model="{esc(json.dumps(model, separators=(",", ":")))}"></div></details>'
    )


# --------------------------------------------------------------------------
# Style and script (inline: the page has no files beside it)

CSS = """
:root{--fg:#1b1b1b;--muted:#5a5a5a;--line:#d0d0d0;--bg-alt:#f5f5f5;--ok:#0072B2;--bad:#D55E00;--na:#6b6b6b;--err:#8a4b00}
*{box-sizing:border-box}
body{font:15px/1.45 system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;color:var(--fg);margin:0;padding:0 1rem 2rem;max-width:1200px;margin-inline:auto}
h1{font-size:1.6rem;margin:1rem 0 .2rem}h2{font-size:1.3rem;margin:0 0 .3rem}h3{font-size:1.05rem;margin:1rem 0 .3rem}
.meta,.path{color:var(--muted);font-size:.85rem;margin:.2rem 0}.path{word-break:break-all}
.sub{font-weight:normal;color:var(--muted);font-size:1rem}
.caution{border-left:4px solid var(--muted);padding:.3rem .7rem;background:var(--bg-alt)}
section{border-top:2px solid var(--line);padding:1rem 0;margin-top:1rem}
.banner{padding:.5rem .8rem;border-radius:4px;border:2px solid;margin:.5rem 0}
.banner .mark{font-weight:bold;font-size:1.1em}
.banner.v-consistent{border-color:var(--ok);background:#e8f2f9}.banner.v-mismatch{border-color:var(--bad);background:#fbeee5}
.banner.v-not-applicable{border-color:var(--na);background:var(--bg-alt)}.banner.v-error{border-color:var(--err);background:#fdf3e1;border-style:dashed}
.steps li{margin:.2rem 0}.why{color:var(--muted)}
table{border-collapse:collapse;margin:.4rem 0;font-size:.88rem}caption{text-align:left;color:var(--muted);padding:.2rem 0;caption-side:top}
th,td{border-bottom:1px solid var(--line);padding:.2rem .5rem;text-align:left;vertical-align:top}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
.sites td:nth-child(n+4),.entries td:nth-child(1),.entries td:nth-child(n+7){text-align:right;font-variant-numeric:tabular-nums}
.scroll{overflow-x:auto}
.counts{display:flex;flex-wrap:wrap;gap:2rem;align-items:flex-start}
.entries th button{font:inherit;font-weight:bold;background:none;border:0;padding:0;cursor:pointer;color:inherit;text-align:left}
.entries th[aria-sort=ascending] button::after{content:" \\25B2"}.entries th[aria-sort=descending] button::after{content:" \\25BC"}
.entries tbody tr:nth-child(even){background:var(--bg-alt)}
.entries tr.v-mismatch td:nth-child(5){color:var(--bad);font-weight:bold}
.linkish{font:inherit;background:none;border:0;padding:0;color:#0b5394;text-decoration:underline;cursor:pointer}
.filters{display:flex;flex-wrap:wrap;gap:.5rem;align-items:center;margin:1rem 0 .3rem}
.filters input{min-width:16rem;padding:.2rem .4rem}#filter-count{color:var(--muted)}
.findings ul{padding-left:1.2rem}.findings li{margin:.3rem 0}
.sev{display:inline-block;min-width:4.2rem;font-size:.8rem;text-transform:uppercase;letter-spacing:.03em;border:1px solid;border-radius:3px;text-align:center;padding:0 .2rem}
.sev-error .sev{color:#fff;background:var(--bad);border-color:var(--bad)}.sev-warning .sev{color:var(--bad)}.sev-info .sev{color:var(--muted)}
.evidence{margin:.2rem 0 .2rem 1rem;font-size:.85rem;color:var(--muted)}dl.evidence{display:grid;grid-template-columns:max-content 1fr;gap:0 .8rem}dl.evidence dd{margin:0}
details{margin:.2rem 0 .2rem 1rem;font-size:.88rem}
.figures{display:flex;flex-wrap:wrap;gap:1rem;align-items:flex-start}
details.viewer{margin:.5rem 0;font-size:.9rem}.viewer-controls{margin:.3rem 0}.viewer-controls .hint{color:var(--muted);font-size:.8rem}
svg.turn{width:min(420px,100%);height:auto;border:1px solid var(--line);touch-action:none;cursor:grab;display:block}
svg.turn:focus{outline:2px solid #0b5394}
svg.turn .cell{stroke:#9a9a9a;stroke-width:.04}svg.turn .bond{stroke:#222;stroke-width:.1;stroke-linecap:round}
svg.turn .bond.cc{stroke:#009E73;stroke-dasharray:.2 .15}svg.turn .atom{stroke:#000;stroke-width:.04}
svg.turn .cation{stroke:#666;stroke-width:.05}svg.turn .ghost{stroke-width:.06}
svg.plot text{font-family:"DejaVu Sans",Arial,Helvetica,sans-serif}
figure{margin:.5rem 0;max-width:100%}figure svg{max-width:100%;height:auto;display:block}figcaption{font-size:.82rem;color:var(--muted);max-width:52rem}
.note{font-style:italic;color:var(--muted)}
footer.page{border-top:2px solid var(--line);margin-top:2rem;font-size:.88rem;color:var(--muted)}
a{color:#0b5394}
@media print{
 body{max-width:none;font-size:10.5pt;padding:0}
 .filters,.back,details,.linkish::after{display:none}
 .linkish{color:inherit;text-decoration:none}
 a{color:inherit;text-decoration:none}
 section.structure{break-before:page}
 figure,table,.banner,.count{break-inside:avoid}
 h2,h3{break-after:avoid}
 .scroll{overflow:visible}
 .banner{background:none!important}
}
"""

JS = r"""
(function(){
  "use strict";
  // The SVG namespace, as the HTML parser assigns it (no address in the page).
  var probe = document.createElement("div");
  probe.innerHTML = "<svg></svg>";
  var SVGNS = probe.firstChild.namespaceURI;
  function setupViewers(){
    Array.prototype.forEach.call(document.querySelectorAll("details.viewer"), function(d){
      d.addEventListener("toggle", function(){ if (d.open && !d.viewer) d.viewer = new Viewer(d); });
    });
  }
  function unit(v){ var n = Math.hypot(v[0], v[1], v[2]) || 1; return [v[0]/n, v[1]/n, v[2]/n]; }
  function cross(a, b){ return [a[1]*b[2]-a[2]*b[1], a[2]*b[0]-a[0]*b[2], a[0]*b[1]-a[1]*b[0]]; }
  function dot(a, b){ return a[0]*b[0]+a[1]*b[1]+a[2]*b[2]; }
  function Viewer(d){
    var box = d.querySelector(".viewer-box");
    var m = JSON.parse(box.getAttribute("data-model"));
    this.m = m;
    var cell = m.cell, o = [0, 0, 0];
    for (var i = 0; i < 3; i++) for (var k = 0; k < 3; k++) o[k] += cell[i][k] / 2;
    this.centre = o;
    var corners = [];
    for (var f = 0; f < 8; f++) {
      var p = [0, 0, 0];
      for (var i2 = 0; i2 < 3; i2++) if (f >> i2 & 1) for (var k2 = 0; k2 < 3; k2++) p[k2] += cell[i2][k2];
      corners.push(p);
    }
    var edges = [];
    for (var a = 0; a < 8; a++) for (var b = a + 1; b < 8; b++) { var x = a ^ b; if (x === 1 || x === 2 || x === 4) edges.push([corners[a], corners[b]]); }
    var radius = 0;
    m.atoms.concat(m.ghosts).forEach(function(t){ radius = Math.max(radius, Math.hypot(t[0]-o[0], t[1]-o[1], t[2]-o[2])); });
    corners.forEach(function(t){ radius = Math.max(radius, Math.hypot(t[0]-o[0], t[1]-o[1], t[2]-o[2])); });
    this.r = radius + 1;
    var svg = document.createElementNS(SVGNS, "svg");
    svg.setAttribute("viewBox", [-this.r, -this.r, 2*this.r, 2*this.r].join(" "));
    svg.setAttribute("class", "turn");
    svg.setAttribute("tabindex", "0");
    svg.setAttribute("role", "img");
    svg.setAttribute("aria-label", "anion substructure in 3D; arrow keys turn it");
    box.appendChild(svg);
    this.svg = svg;
    var self = this, items = [];
    function line(p, q, cls){ var e = document.createElementNS(SVGNS, "line"); e.setAttribute("class", cls); svg.appendChild(e); items.push({el: e, p: p, q: q}); }
    function dotAt(t, r, cls, fill, title){
      var e = document.createElementNS(SVGNS, "circle"); e.setAttribute("r", r); e.setAttribute("class", cls);
      e.setAttribute("fill", fill); svg.appendChild(e);
      if (title) { var tt = document.createElementNS(SVGNS, "title"); tt.textContent = title; e.appendChild(tt); }
      e.setAttribute("data-i", items.length);
      var it = {el: e, p: [t[0], t[1], t[2]]};
      items.push(it);
      return it;
    }
    edges.forEach(function(e){ line(e[0], e[1], "cell"); });
    m.bonds.forEach(function(t){ line(t.slice(0, 3), t.slice(3, 6), t[6] === "cc" ? "bond cc" : "bond"); });
    m.ghosts.forEach(function(t){ dotAt(t, t[4] ? 0.32 : 0.16, t[4] ? "ghost anion" : "ghost", "white").el.setAttribute("stroke", t[3]); });
    m.atoms.forEach(function(t){ dotAt(t, t[4] ? 0.38 : 0.17, t[4] ? "atom anion" : "atom cation", t[4] ? t[3] : "white", t[5]); });
    this.items = items;
    this.setView("c");
    var drag = null;
    svg.addEventListener("pointerdown", function(e){ drag = [e.clientX, e.clientY]; svg.setPointerCapture(e.pointerId); });
    svg.addEventListener("pointermove", function(e){
      if (!drag) return;
      self.turn((e.clientX - drag[0]) * 0.01, (e.clientY - drag[1]) * 0.01); drag = [e.clientX, e.clientY];
    });
    svg.addEventListener("pointerup", function(){ drag = null; });
    svg.addEventListener("keydown", function(e){
      var s = 0.1, k = {ArrowLeft: [-s, 0], ArrowRight: [s, 0], ArrowUp: [0, -s], ArrowDown: [0, s]}[e.key];
      if (k) { self.turn(k[0], k[1]); e.preventDefault(); }
    });
    Array.prototype.forEach.call(d.querySelectorAll("button[data-view]"), function(b){
      b.addEventListener("click", function(){ self.setView(b.getAttribute("data-view")); });
    });
  }
  Viewer.prototype.setView = function(axis){
    var c = this.m.cell, i = {a: 0, b: 1, c: 2}[axis];
    var n = unit(cross(c[(i+1)%3], c[(i+2)%3]));
    var x = c[(i+1)%3], xu = unit([x[0]-dot(x,n)*n[0], x[1]-dot(x,n)*n[1], x[2]-dot(x,n)*n[2]]);
    this.ex = xu; this.ey = cross(n, xu); this.ez = n;
    this.draw();
  };
  Viewer.prototype.turn = function(yaw, pitch){
    function rot(u, v, t){ var c = Math.cos(t), s = Math.sin(t); return [[u[0]*c+v[0]*s, u[1]*c+v[1]*s, u[2]*c+v[2]*s], [v[0]*c-u[0]*s, v[1]*c-u[1]*s, v[2]*c-u[2]*s]]; }
    var r = rot(this.ex, this.ez, yaw); this.ex = r[0]; this.ez = r[1];
    r = rot(this.ey, this.ez, pitch); this.ey = r[0]; this.ez = r[1];
    this.draw();
  };
  Viewer.prototype.draw = function(){
    var o = this.centre, ex = this.ex, ey = this.ey, ez = this.ez;
    function pr(p){ var d = [p[0]-o[0], p[1]-o[1], p[2]-o[2]]; return [dot(d, ex), -dot(d, ey), dot(d, ez)]; }
    var order = [];
    this.items.forEach(function(it){
      var a = pr(it.p);
      if (it.q) {
        var b = pr(it.q);
        it.el.setAttribute("x1", a[0].toFixed(3)); it.el.setAttribute("y1", a[1].toFixed(3));
        it.el.setAttribute("x2", b[0].toFixed(3)); it.el.setAttribute("y2", b[1].toFixed(3));
        order.push([(a[2] + b[2]) / 2 - 0.01, it.el]);
      } else {
        it.el.setAttribute("cx", a[0].toFixed(3)); it.el.setAttribute("cy", a[1].toFixed(3));
        order.push([a[2], it.el]);
      }
    });
    order.sort(function(p, q){ return p[0] - q[0]; });
    var svg = this.svg;
    order.forEach(function(t){ svg.appendChild(t[1]); });
  };
  setupViewers();
  var table = document.getElementById("entries");
  if (!table) return;
  var tbody = table.tBodies[0];
  var rows = Array.prototype.slice.call(tbody.rows);
  var text = document.getElementById("filter-text");
  var verdict = document.getElementById("filter-verdict");
  var count = document.getElementById("filter-count");
  function apply(){
    var t = text.value.trim().toLowerCase(), v = verdict.value, n = 0;
    rows.forEach(function(r){
      var ok = (!t || r.textContent.toLowerCase().indexOf(t) >= 0) && (!v || r.getAttribute("data-verdict") === v);
      r.hidden = !ok; if (ok) n++;
    });
    count.textContent = n + " of " + rows.length + " entries shown";
  }
  text.addEventListener("input", apply);
  verdict.addEventListener("change", apply);
  var heads = table.tHead.rows[0].cells;
  Array.prototype.forEach.call(heads, function(th, col){
    th.querySelector("button").addEventListener("click", function(){
      var dir = th.getAttribute("aria-sort") === "ascending" ? -1 : 1;
      Array.prototype.forEach.call(heads, function(h){ h.setAttribute("aria-sort", "none"); });
      th.setAttribute("aria-sort", dir > 0 ? "ascending" : "descending");
      var num = th.getAttribute("data-kind") === "num";
      rows.sort(function(a, b){
        var x = a.cells[col].getAttribute("data-sort"), y = b.cells[col].getAttribute("data-sort");
        if (x === y) return 0;
        if (x === "") return 1;
        if (y === "") return -1;
        if (num) return dir * (parseFloat(x) - parseFloat(y));
        return dir * (x < y ? -1 : 1);
      });
      rows.forEach(function(r){ tbody.appendChild(r); });
    });
  });
  Array.prototype.forEach.call(document.querySelectorAll("button[data-filter]"), function(b){
    b.addEventListener("click", function(){ text.value = b.getAttribute("data-filter"); verdict.value = ""; apply(); table.scrollIntoView(); });
  });
  Array.prototype.forEach.call(document.querySelectorAll("button[data-verdict]"), function(b){
    b.addEventListener("click", function(){ verdict.value = b.getAttribute("data-verdict"); text.value = ""; apply(); table.scrollIntoView(); });
  });
  var params = new URLSearchParams(location.search);
  if (params.get("q")) text.value = params.get("q");
  if (params.get("verdict")) verdict.value = params.get("verdict");
  apply();
})();
"""
