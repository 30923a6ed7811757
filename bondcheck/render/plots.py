"""Figures for the HTML report, and the per-structure detail they are drawn from.

`collect(crystal)` runs the pipeline stages for one crystal (bonds, sites,
count) next to `api.check_crystal` and keeps what the figures need: every
contact of every crystallographic site with its ratio d/(r_i + r_j), the
anion substructure (atom positions, anion-anion and cation-cation bonds, the
cell) and the electrons the closed count puts on each cation group.

The drawing functions return inline SVG text (matplotlib, Agg backend, text
kept as text), with ids made unique per figure and nothing that refers to
anything outside the page. matplotlib is imported inside the functions.
"""
from __future__ import annotations

import io
import itertools
import math
import re
from dataclasses import dataclass, field

import numpy as np

from .. import elements
from ..bonds import CORE_RATIO, EXTENDED_RATIO, SEARCH, Criterion

# Okabe & Ito, "Color Universal Design" (2008): a palette that stays
# distinguishable with the common colour-vision deficiencies.
OKABE_ITO = {
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
    "black": "#000000",
    "grey": "#8C8C8C",
}
# Element colours in the substructure picture, in order of appearance
# (yellow is left out: too light on white paper).
ELEMENT_CYCLE = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000")

# Contact kinds: (legend text, marker, colour). Shape and colour both carry
# the kind; filled or hollow carries counted or not.
KINDS = {
    "anion-anion": ("anion\u2013anion", "o", OKABE_ITO["blue"]),
    "cation-anion": ("cation\u2013anion", "s", OKABE_ITO["orange"]),
    "cation-cation": ("cation\u2013cation", "^", OKABE_ITO["green"]),
    "electropositive": ("two electropositive atoms (never a bond)", "D", OKABE_ITO["grey"]),
    "contact": ("contact (no anion role)", "o", OKABE_ITO["purple"]),
}
# Verdicts in the scan scatter: (legend text, marker, colour).
VERDICTS = {
    "consistent": ("consistent", "o", OKABE_ITO["blue"]),
    "mismatch": ("mismatch", "^", OKABE_ITO["vermillion"]),
    "not-applicable": ("not applicable", "D", OKABE_ITO["grey"]),
}

_RC = {
    "svg.fonttype": "none",
    "svg.hashsalt": "bondcheck",
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Arial", "Helvetica"],
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.labelsize": 9,
    "legend.fontsize": 8,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
}


# --------------------------------------------------------------------------
# Detail of one structure


@dataclass(slots=True)
class Contact:
    ratio: float
    d: float
    partner: str  # partner's site label
    element: str  # partner's element
    kind: str
    bonded: bool
    fragile: bool
    n: int = 1  # equal contacts merged into one point


@dataclass(slots=True)
class SiteContacts:
    label: str
    element: str
    role: str | None
    contacts: list[Contact]


@dataclass(slots=True)
class Kept:
    """Electrons a closed count leaves on one cation group."""

    label: str
    element: str
    per_atom: float  # electrons kept per atom
    in_cc_bonds: float  # of which in cation-cation bonds (bonds per atom)
    atoms_per_formula: float
    what: str

    @property
    def per_formula(self) -> float:
        return self.per_atom * self.atoms_per_formula


@dataclass(slots=True)
class Detail:
    """What the report draws for one structure, next to its Result."""

    result: object  # api.Result
    cell: np.ndarray | None = None
    cart: np.ndarray | None = None  # (n, 3) positions in the cell, angstrom
    symbols: list[str] = field(default_factory=list)
    labels: list[str] = field(default_factory=list)
    site_labels: list[str] = field(default_factory=list)  # per atom: the label of its site row
    role: np.ndarray | None = None  # per atom: True anion, False cation; None without a count
    occupancy: np.ndarray | None = None
    rep_atoms: list[int] = field(default_factory=list)  # one atom per site row
    aa_bonds: list[tuple[int, int, tuple[int, int, int]]] = field(default_factory=list)
    cc_bonds: list[tuple[int, int, tuple[int, int, int]]] = field(default_factory=list)
    other_bonds: list[tuple[int, int, tuple[int, int, int]]] = field(default_factory=list)
    site_contacts: list[SiteContacts] = field(default_factory=list)
    criterion: Criterion = field(default_factory=Criterion)
    kept: list[Kept] = field(default_factory=list)
    pi_per_formula: float = 0.0
    closes: bool | None = None
    formula_units: float = 1.0
    figures: tuple[str, str] | None = None  # (contact plot, substructure picture) once drawn


def render_figures(det: Detail, prefix: str) -> tuple[str, str]:
    """Both figures of a structure as SVG text, ids prefixed with `prefix`."""
    return contact_plot(det, f"{prefix}c"), substructure_plot(det, f"{prefix}p")


def _label(crystal, k: int, syms) -> str:
    lab = str(crystal.labels[k]) if len(crystal.labels) else ""
    return lab or f"{syms[int(crystal.numbers[k])]}{k + 1}"


def collect(crystal, options=None) -> Detail:
    """Check one crystal and collect what its figures need.

    Runs `api.check_crystal` for the Result and the stages read.read ->
    bonds.find_contacts -> symmetry.find_sites -> count.count once more for
    the per-contact detail. A structure that cannot be checked gives a Detail
    holding only its (error) Result."""
    from ..api import Options, check_crystal, formula_of
    from ..bonds import find_contacts
    from ..count import count
    from ..symmetry import find_sites

    options = options or Options()
    result = check_crystal(crystal, options)
    det = Detail(result=result, criterion=options.criterion)
    if result.status != "ok":
        return det
    contacts = find_contacts(crystal, options.criterion)
    sites = find_sites(crystal)
    c = count(crystal, contacts, sites, options.anions, options.valence)
    syms = elements.symbols()
    n = crystal.natoms
    det.cell = np.asarray(crystal.cell, dtype=float)
    det.cart = np.mod(crystal.frac, 1.0) @ det.cell
    det.symbols = [syms[int(z)] for z in crystal.numbers]
    det.labels = [_label(crystal, k, syms) for k in range(n)]
    det.occupancy = np.asarray(crystal.occupancy, dtype=float)
    det.role = None if c is None else np.asarray(c.role, dtype=bool)
    _, det.formula_units = formula_of(crystal)

    # Bonds for the picture.
    bonded = np.flatnonzero(contacts.bonded)
    aa = np.zeros(bonded.size, dtype=bool) if c is None else np.asarray(c.aa_bond, dtype=bool)
    cc = np.zeros(bonded.size, dtype=bool) if c is None else np.asarray(c.cc_bond, dtype=bool)
    for m, k in enumerate(bonded):
        b = (int(contacts.i[k]), int(contacts.j[k]), tuple(int(s) for s in contacts.shift[k]))
        if aa[m]:
            det.aa_bonds.append(b)
        elif cc[m]:
            det.cc_bonds.append(b)
        elif c is None:
            det.other_bonds.append(b)

    # One representative atom per (site, element), in the order of the site table.
    key = sites.site.astype(np.int64) * 128 + crystal.numbers
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    det.rep_atoms = sorted(int(k) for k in first)
    det.site_labels = [det.labels[int(first[g])] for g in inverse.reshape(-1)]
    det.site_contacts = [_site_contacts(crystal, contacts, c, k, det) for k in det.rep_atoms]

    if c is not None:
        det.closes = bool(c.closure.closes)
        if c.closure.closes:
            det.kept = _kept(crystal, c, det)
            det.pi_per_formula = float(c.closure.pi_electrons) / det.formula_units
    return det


def _kind(role, a: int, b: int, ionic: bool) -> str:
    if ionic:
        return "electropositive"
    if role is None:
        return "contact"
    ra, rb = bool(role[a]), bool(role[b])
    if ra and rb:
        return "anion-anion"
    if ra or rb:
        return "cation-anion"
    return "cation-cation"


def _site_contacts(crystal, contacts, c, k: int, det: Detail) -> SiteContacts:
    """Every contact of atom k (both directions; a contact to the atom's own
    periodic image appears once in the half list and counts twice here)."""
    role = det.role
    sel_i = np.flatnonzero(contacts.i == k)
    sel_j = np.flatnonzero((contacts.j == k) & (contacts.i != k))
    rows: dict[tuple, Contact] = {}
    pairs = [(int(t), int(contacts.j[t])) for t in sel_i] + [(int(t), int(contacts.i[t])) for t in sel_j]
    for idx, other in pairs:
        times = 2 if other == k else 1
        kind = _kind(role, k, other, bool(contacts.ionic_pair[idx]))
        ratio = float(contacts.ratio[idx])
        # Equal contacts (to 0.01 in ratio, finer than the plot shows) make one point.
        key = (round(ratio, 2), kind, bool(contacts.bonded[idx]), det.site_labels[other])
        if key in rows:
            rows[key].n += times
            if ratio < rows[key].ratio:
                rows[key].ratio, rows[key].d = ratio, float(contacts.d[idx])
        else:
            rows[key] = Contact(
                ratio=ratio,
                d=float(contacts.d[idx]),
                partner=det.site_labels[other],
                element=det.symbols[other],
                kind=kind,
                bonded=bool(contacts.bonded[idx]),
                fragile=bool(contacts.fragile[idx]),
                n=times,
            )
    out = sorted(rows.values(), key=lambda x: x.ratio)
    r = None if role is None else ("anion" if role[k] else "cation")
    return SiteContacts(det.labels[k], det.symbols[k], r, out)


def _kept(crystal, c, det: Detail) -> list[Kept]:
    out = []
    for g, per_atom in sorted(c.closure.keep.items()):
        atoms = np.flatnonzero(c.group_of == g)
        if atoms.size == 0:
            continue
        k = int(atoms[0])
        sym = det.symbols[k]
        weight = float(np.sum(crystal.occupancy[atoms]))
        ccb = float(np.mean(c.aa_bonds[atoms]))
        per_atom = float(per_atom)
        own = per_atom - ccb
        blk = elements.block(sym)
        parts = []
        if blk == "d":
            parts.append(f"d{_num(per_atom)}")
        elif blk == "f" and per_atom < -1e-6:
            parts.append(f"gives {_num(-per_atom)} more (4+)")
        elif blk == "f":
            parts.append(f"{_num(per_atom)} f electrons")
        elif own > 1e-6:
            parts.append("a lone pair" if abs(own - 2) < 1e-6 else f"{_num(own)} lone-pair electrons")
        if ccb > 1e-6:
            parts.append(f"{_num(ccb)} in cation\u2013cation bonds")
        what = ", ".join(parts) or "none"
        out.append(Kept(det.labels[k], sym, per_atom, ccb, weight / det.formula_units, what))
    return out


def _num(x: float) -> str:
    return str(int(round(x))) if abs(x - round(x)) < 1e-6 else f"{x:.3g}"


# --------------------------------------------------------------------------
# SVG handling

_FIG_COUNTER = itertools.count(1)


_NUMBER = re.compile(r"(-?\d+\.\d{2})\d+")


def _round_numbers(text: str) -> str:
    return " ".join(_NUMBER.sub(r"\1", text).split())


def _svg_text(fig, prefix: str | None = None) -> str:
    """The figure as inline SVG: no XML prolog, DOCTYPE, metadata or namespace
    URIs (HTML parses inline SVG without them), ids prefixed so that several
    figures can share a page, links opening in place."""
    import matplotlib.pyplot as plt

    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    plt.close(fig)
    s = buf.getvalue()
    s = s[s.index("<svg") :]
    s = re.sub(r"<metadata>.*?</metadata>\s*", "", s, flags=re.S)
    s = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", s)
    s = s.replace(' target="_blank"', "").replace("<a xlink:href=", "<a href=")
    # Smaller: the page's CSS sets the font; coordinates to 0.01 pt.
    s = re.sub(r"font-family: [^;\"]*;?\s*", "", s)
    s = re.sub(r'\b(d|x|y|points)="([^"]*)"', lambda m: f'{m.group(1)}="{_round_numbers(m.group(2))}"', s)
    prefix = prefix or f"f{next(_FIG_COUNTER)}"
    ids = set(re.findall(r'\bid="([^"]+)"', s))
    if ids:
        pat = re.compile(r'(\bid="|#)(' + "|".join(re.escape(i) for i in sorted(ids, key=len, reverse=True)) + r')(?=["\)])')
        s = pat.sub(lambda m: f"{m.group(1)}{prefix}-{m.group(2)}", s)
    # Size from the viewBox; the page scales figures with CSS.
    s = s.replace("<svg ", '<svg class="plot" ', 1)
    return s.strip()


def _figure(plt, width: float, height: float, left: float, right: float, bottom: float, top: float):
    """A figure with one axes placed by fixed margins in inches (cheaper
    than an automatic layout, and the same from one report to the next)."""
    fig = plt.figure(figsize=(width, height), dpi=72)
    ax = fig.add_axes((left / width, bottom / height, (width - left - right) / width, (height - bottom - top) / height))
    return fig, ax


def _axes_box(fig, ax) -> dict:
    """Axes rectangle in SVG user units (points, y downwards) and the data limits,
    so that the page (and tests) can map drawn points back to data values."""
    fig.canvas.draw()
    bb = ax.get_window_extent()
    h = fig.get_figheight() * 72.0
    scale = 72.0 / fig.dpi
    return {
        "x0": bb.x0 * scale,
        "x1": bb.x1 * scale,
        "y0": h - bb.y1 * scale,
        "y1": h - bb.y0 * scale,
        "xlim": [float(v) for v in ax.get_xlim()],
        "ylim": [float(v) for v in ax.get_ylim()],
    }


# --------------------------------------------------------------------------
# Contact plot


def contact_plot(det: Detail, prefix: str | None = None) -> str:
    """Per site, every neighbour's ratio d/(r_i + r_j); the bond criterion as
    lines; counted contacts filled, uncounted hollow."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from matplotlib.lines import Line2D

    sites = det.site_contacts
    ns = max(1, len(sites))
    width = min(10.0, max(3.4, 0.9 + 0.55 * ns))
    offsets = {"anion-anion": -0.22, "cation-anion": 0.0, "cation-cation": 0.22, "electropositive": 0.22, "contact": 0.0}
    with plt.rc_context(_RC):
        rotate = ns > 14
        fig, ax = _figure(plt, width + 2.9, 3.8 + (0.5 if rotate else 0.0), 0.75, 2.9, 0.85 + (0.5 if rotate else 0.0), 0.15)
        groups: dict[tuple[str, bool], tuple[list, list]] = {}
        # "xn" labels go right of their marker, or left when a label at the
        # same x would overlap, or are left out when both sides are taken.
        taken: dict[tuple[float, int], list[float]] = {}
        gap = 0.022
        for x, sc in enumerate(sites):
            for ct in sc.contacts:
                xx = x + offsets[ct.kind]
                xs, ys = groups.setdefault((ct.kind, ct.bonded), ([], []))
                xs.append(xx)
                ys.append(ct.ratio)
                if ct.n < 2:
                    continue
                for side, dx, ha in ((1, 5, "left"), (-1, -5, "right")):
                    ys_side = taken.setdefault((round(xx, 2), side), [])
                    if all(abs(ct.ratio - y) > gap for y in ys_side):
                        ys_side.append(ct.ratio)
                        ax.annotate(f"\u00d7{ct.n}", (xx, ct.ratio), xytext=(dx, -3), textcoords="offset points", fontsize=6.5, color="#333333", ha=ha)
                        break
        used = {kind for kind, _ in groups}
        for (kind, bonded), (xs, ys) in sorted(groups.items()):
            label, marker, colour = KINDS[kind]
            ax.scatter(
                xs,
                ys,
                marker=marker,
                s=30,
                facecolors=colour if bonded else "white",
                edgecolors=colour,
                linewidths=1.2,
                zorder=3,
                gid=f"contacts-{kind}-{'bonded' if bonded else 'not-bonded'}",
            )
        crit = det.criterion
        extended = crit.core * EXTENDED_RATIO / CORE_RATIO
        lines = [
            (crit.core, "-", f"bond up to {crit.core:.2f}"),
            (extended, "--", f"up to {extended:.2f} if nearest of its kind"),
            (crit.maximum, ":", f"never beyond {crit.maximum:.2f}"),
        ]
        for y, style, _ in lines:
            ax.axhline(y, color="#444444", linestyle=style, linewidth=0.9, zorder=1)
        ax.set_xlim(-0.6, ns - 0.4)
        ax.set_ylim(0.6, SEARCH + 0.02)
        ax.set_xticks(range(len(sites)))
        if rotate:
            ax.set_xticklabels([f"{s.label} ({s.role})" if s.role else s.label for s in sites], rotation=90, fontsize=6.5 if ns > 40 else 8)
        else:
            ax.set_xticklabels([f"{s.label}\n{s.role or ''}" for s in sites])
        ax.set_xlabel("crystallographic site (one atom of each)")
        ax.set_ylabel("d / (r\u1d62 + r\u2c7c)  (dimensionless)")
        ax.grid(axis="y", color="#e6e6e6", linewidth=0.6, zorder=0)
        handles = []
        for kind in KINDS:
            if kind in used:
                label, marker, colour = KINDS[kind]
                handles.append(Line2D([], [], linestyle="none", marker=marker, markerfacecolor=colour, markeredgecolor=colour, label=label))
        handles.append(Line2D([], [], linestyle="none", marker="o", markerfacecolor="#444444", markeredgecolor="#444444", label="filled: counted as a bond"))
        handles.append(Line2D([], [], linestyle="none", marker="o", markerfacecolor="white", markeredgecolor="#444444", label="hollow: not counted"))
        for y, style, text in lines:
            handles.append(Line2D([], [], color="#444444", linestyle=style, linewidth=0.9, label=text))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, borderaxespad=0)
        return _svg_text(fig, prefix)


# --------------------------------------------------------------------------
# Anion substructure picture


def _view(det: Detail, bonds) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Pick the viewing direction among the normals of the cell faces (looking
    down a*, b*, c*): bonds seen side-on and few atoms on top of each other.
    Returns (view normal, in-plane x, in-plane y, name)."""
    cell = det.cell
    recip = np.linalg.inv(cell).T  # rows: a*, b*, c* (without 2 pi)
    names = ["a", "b", "c"]
    vecs = []
    for i, j, shift in bonds:
        vecs.append(det.cart[j] + np.asarray(shift) @ cell - det.cart[i])
    vecs = np.array(vecs) if vecs else np.zeros((0, 3))
    best = None
    for axis in (2, 0, 1):
        nrm = recip[axis] / np.linalg.norm(recip[axis])
        if len(vecs):
            ln = np.linalg.norm(vecs, axis=1)
            along = np.abs(vecs @ nrm) / np.maximum(ln, 1e-9)
            visible = float(np.mean(np.sqrt(np.clip(1 - along**2, 0, 1))))
        else:
            visible = 1.0
        # Crowding: atom pairs closer than 0.6 angstrom in projection.
        p = det.cart - np.outer(det.cart @ nrm, nrm)
        if len(p) <= 400:
            dd = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
            crowd = float(np.mean(dd[np.triu_indices(len(p), 1)] < 0.6)) if len(p) > 1 else 0.0
        else:
            crowd = 0.0
        score = visible - 2.0 * crowd
        if best is None or score > best[0] + 1e-6:
            best = (score, axis, nrm)
    _, axis, nrm = best
    inplane = cell[(axis + 1) % 3]
    ex = inplane - (inplane @ nrm) * nrm
    ex /= np.linalg.norm(ex)
    ey = np.cross(nrm, ex)
    other = [names[(axis + 1) % 3], names[(axis + 2) % 3]]
    plane = "".join(sorted(other))
    return nrm, ex, ey, f"looking down {names[axis]}* (onto the {plane} plane)"


def substructure_plot(det: Detail, prefix: str | None = None) -> str:
    """The anion substructure projected onto a cell face: anion-anion bonds
    drawn, anions coloured by element, cations as small hollow points,
    cation-cation bonds dashed, the cell outlined. The plot area takes the
    shape of the projected cell, so that nothing is stretched."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    cell = det.cell
    role = det.role
    main_bonds = det.aa_bonds if role is not None else det.other_bonds
    nrm, ex, ey, view = _view(det, main_bonds or det.cc_bonds)

    def proj(p):
        p = np.atleast_2d(p)
        return np.stack([p @ ex, p @ ey], axis=1)

    is_anion = np.ones(len(det.symbols), dtype=bool) if role is None else role
    anion_elements = list(dict.fromkeys(s for s, a in zip(det.symbols, is_anion) if a))
    colour = {el: ELEMENT_CYCLE[k % len(ELEMENT_CYCLE)] for k, el in enumerate(anion_elements)}

    # Geometry first: cell edges, bonds (a bond across the cell boundary is
    # drawn from both atoms in the cell, each to the other's image), images.
    corners = np.array(list(itertools.product((0, 1), repeat=3)), dtype=float)
    edges = [
        proj(corners[[a, b]] @ cell) for a, b in itertools.combinations(range(8), 2) if np.sum(np.abs(corners[a] - corners[b])) == 1
    ]
    bond_sets = []
    ghosts: dict[tuple, tuple[int, np.ndarray]] = {}
    for bonds, style, col, lw, gid in (
        (main_bonds, "-", "#222222", 1.6, "bonds-main"),
        (det.cc_bonds, "--", OKABE_ITO["green"], 1.2, "bonds-cation-cation"),
    ):
        segs = []
        for i, j, shift in bonds:
            sh = np.asarray(shift, dtype=float) @ cell
            segs.append(proj(np.array([det.cart[i], det.cart[j] + sh])))
            if any(shift):
                segs.append(proj(np.array([det.cart[j], det.cart[i] - sh])))
                for k, q in ((j, segs[-2][1]), (i, segs[-1][1])):
                    ghosts.setdefault((k, round(float(q[0]), 3), round(float(q[1]), 3)), (k, q))
        bond_sets.append((segs, style, col, lw, gid))
    atoms2d = proj(det.cart)
    pts = [atoms2d, np.concatenate(edges)] + [np.concatenate(b[0]) for b in bond_sets if b[0]]
    allp = np.concatenate(pts)
    (x0, y0), (x1, y1) = allp.min(axis=0), allp.max(axis=0)
    pad = 0.06 * max(x1 - x0, y1 - y0, 1.0)
    x0, x1, y0, y1 = x0 - pad, x1 + pad, y0 - pad, y1 + pad
    long_side = 4.4
    if x1 - x0 >= y1 - y0:
        w, h = long_side, max(1.8, long_side * (y1 - y0) / (x1 - x0))
    else:
        w, h = max(1.8, long_side * (x1 - x0) / (y1 - y0)), long_side
    # Keep the data aspect: widen the shorter range when a minimum size applies.
    sx, sy = (x1 - x0) / w, (y1 - y0) / h
    if sx > sy:
        c = (y0 + y1) / 2
        y0, y1 = c - sx * h / 2, c + sx * h / 2
    else:
        c = (x0 + x1) / 2
        x0, x1 = c - sy * w / 2, c + sy * w / 2

    with plt.rc_context(_RC):
        fig, ax = _figure(plt, w + 0.75 + 2.1, max(h, 2.4) + 0.6 + 0.35, 0.75, 2.1, 0.6 + max(0.0, 2.4 - h), 0.35)
        ax.add_collection(LineCollection(edges, colors="#9a9a9a", linewidths=0.8, zorder=1))
        for segs, style, col, lw, gid in bond_sets:
            if segs:
                ax.add_collection(LineCollection(segs, colors=col, linewidths=lw, linestyles=style, zorder=2, gid=gid))
        cat = np.flatnonzero(~is_anion)
        if cat.size:
            ax.scatter(atoms2d[cat, 0], atoms2d[cat, 1], s=12, facecolors="white", edgecolors="#666666", linewidths=0.8, zorder=3)
        ghost_an: dict[str, list] = {}
        ghost_cat = []
        for k, q in ghosts.values():
            (ghost_an.setdefault(det.symbols[k], []) if is_anion[k] else ghost_cat).append(q)
        for el, qs in ghost_an.items():
            qs = np.array(qs)
            ax.scatter(qs[:, 0], qs[:, 1], s=34, facecolors="white", edgecolors=colour[el], linewidths=1.0, zorder=3)
        if ghost_cat:
            qs = np.array(ghost_cat)
            ax.scatter(qs[:, 0], qs[:, 1], s=12, facecolors="white", edgecolors="#666666", linewidths=0.8, zorder=3)
        # Anions, far ones first.
        an = np.flatnonzero(is_anion)
        if an.size:
            an = an[np.argsort(det.cart[an] @ nrm)]
            ax.scatter(atoms2d[an, 0], atoms2d[an, 1], s=44, c=[colour[det.symbols[k]] for k in an], edgecolors="black", linewidths=0.6, zorder=4)
        labelled = [k for k in an if k in set(det.rep_atoms)]
        if len(labelled) <= 12:  # more labels than that only hide the picture
            for k in labelled:
                ax.annotate(det.labels[k], tuple(atoms2d[k]), xytext=(4, 4), textcoords="offset points", fontsize=7, zorder=5)
        ax.set_xlim(x0, x1)
        ax.set_ylim(y0, y1)
        ax.set_xlabel("x in the projection plane (\u00c5)")
        ax.set_ylabel("y (\u00c5)")
        ax.set_title(view, fontsize=9)
        handles = [
            Line2D([], [], linestyle="none", marker="o", markerfacecolor=colour[el], markeredgecolor="black", label=f"{el} (anion)" if role is not None else el)
            for el in anion_elements
        ]
        if cat.size:
            handles.append(Line2D([], [], linestyle="none", marker="o", markersize=4, markerfacecolor="white", markeredgecolor="#666666", label="cation"))
        handles.append(Line2D([], [], color="#222222", linewidth=1.6, label="anion\u2013anion bond" if role is not None else "bond"))
        if det.cc_bonds:
            handles.append(Line2D([], [], color=OKABE_ITO["green"], linestyle="--", linewidth=1.2, label="cation\u2013cation bond"))
        if ghosts:
            handles.append(Line2D([], [], linestyle="none", marker="o", markerfacecolor="white", markeredgecolor="#444444", label="image outside the cell"))
        handles.append(Line2D([], [], color="#9a9a9a", linewidth=0.8, label="unit cell"))
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, borderaxespad=0)
        return _svg_text(fig, prefix)


MODEL_MAX_ATOMS = 400  # larger cells get the static picture only


def substructure_model(det: Detail) -> dict | None:
    """The substructure as plain numbers for the page's 3D viewer: cell rows,
    atoms (x, y, z, colour, anion?, label), bonds as Cartesian end points with
    their kind, and bond partners outside the cell. Angstrom, rounded to
    0.01. None for cells above MODEL_MAX_ATOMS atoms."""
    if det.cell is None or len(det.symbols) > MODEL_MAX_ATOMS:
        return None
    role = det.role
    is_anion = np.ones(len(det.symbols), dtype=bool) if role is None else role
    anion_elements = list(dict.fromkeys(s for s, a in zip(det.symbols, is_anion) if a))
    colour = {el: ELEMENT_CYCLE[k % len(ELEMENT_CYCLE)] for k, el in enumerate(anion_elements)}
    r2 = lambda v: [round(float(x), 2) for x in v]  # noqa: E731
    reps = set(det.rep_atoms)
    atoms = []
    for k, (p, el) in enumerate(zip(det.cart, det.symbols)):
        a = bool(is_anion[k])
        atoms.append(r2(p) + [colour[el] if a else "#666666", 1 if a else 0, det.labels[k] if (a and k in reps) else ""])
    bonds, ghosts = [], {}
    main = det.aa_bonds if role is not None else det.other_bonds
    for kind, group in (("main", main), ("cc", det.cc_bonds)):
        for i, j, shift in group:
            sh = np.asarray(shift, dtype=float) @ det.cell
            ends = [(i, det.cart[i], j, det.cart[j] + sh)]
            if any(shift):
                ends.append((j, det.cart[j], i, det.cart[i] - sh))
            for _, p0, k1, p1 in ends:
                bonds.append(r2(p0) + r2(p1) + [kind])
                if any(shift):
                    key = (k1, *[round(float(x), 2) for x in p1])
                    ghosts[key] = r2(p1) + [atoms[k1][3], atoms[k1][4]]
    return {"cell": [r2(v) for v in det.cell], "atoms": atoms, "bonds": bonds, "ghosts": list(ghosts.values())}


# --------------------------------------------------------------------------
# Scan scatter


def scatter_points(rows: list[dict]) -> list[dict]:
    """The entries the scatter can place: an anion count with VEC and AA."""
    pts = []
    for n, r in enumerate(rows):
        v, a = r.get("vec_anion"), r.get("aa_observed")
        if r.get("status", "ok") != "ok" or not _finite(v) or not _finite(a):
            continue
        verdict = r.get("verdict") if r.get("verdict") in VERDICTS else "not-applicable"
        pts.append({"entry": n, "vec_anion": float(v), "aa_observed": float(a), "verdict": verdict})
    return pts


def _finite(x) -> bool:
    try:
        return x is not None and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def scatter_plot(rows: list[dict], anchors: list[str], names: list[str]) -> tuple[str, dict]:
    """AA observed against VEC per anion for every entry, with the line
    AA = 8 - VEC. Each point links to the entry's section (anchors[n], None
    for an entry without one).
    Returns the SVG and the axes box (for mapping points back to data)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    pts = scatter_points(rows)
    with plt.rc_context(_RC):
        fig, ax = _figure(plt, 9.0, 4.8, 0.7, 2.3, 0.6, 0.2)
        xs = [p["vec_anion"] for p in pts] or [4.0, 8.0]
        lo, hi = min(min(xs), 4.0) - 0.3, max(max(xs), 8.0) + 0.3
        xx = np.array([lo, hi])
        ax.plot(xx, 8 - xx, color="#333333", linewidth=1.0, zorder=1, label="AA = 8 \u2212 VEC (8\u2212N rule)")
        for verdict, (label, marker, colour) in VERDICTS.items():
            sel = [p for p in pts if p["verdict"] == verdict]
            if not sel:
                continue
            col = ax.scatter(
                [p["vec_anion"] for p in sel],
                [p["aa_observed"] for p in sel],
                marker=marker,
                s=34,
                facecolors=colour,
                edgecolors="black" if verdict == "mismatch" else colour,
                linewidths=0.6,
                alpha=0.8,
                zorder=3 if verdict == "mismatch" else 2,
                label=f"{label} ({len(sel)})",
                gid=f"pts-{verdict}",
            )
            col.set_urls([f"#{anchors[p['entry']]}" if anchors[p["entry"]] else None for p in sel])
        ys = [p["aa_observed"] for p in pts] or [0.0, 4.0]
        ylo, yhi = min(min(ys), 0.0), max(max(ys), 8 - lo, 1.0)
        pad = 0.05 * (yhi - ylo)
        ax.set_xlim(lo, hi)
        ax.set_ylim(ylo - pad, yhi + pad)
        ax.set_xlabel("VEC per anion (valence electrons per anion)")
        ax.set_ylabel("observed anion\u2013anion bonds per anion")
        ax.grid(color="#e6e6e6", linewidth=0.6, zorder=0)
        ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False, borderaxespad=0)
        box = _axes_box(fig, ax)
        svg = _svg_text(fig, prefix="scatter")
    # A tooltip per point: the entry's name.
    order = {f"#{anchors[p['entry']]}": p["entry"] for p in pts if anchors[p["entry"]]}

    def title(m):
        n = order.get(m.group(1))
        if n is None:
            return m.group(0)
        return f'{m.group(0)}<title>{_esc(names[n])}</title>'

    svg = re.sub(r'<a href="(#[^"]+)">', title, svg)
    return svg, box


def _esc(s: str) -> str:
    import html

    return html.escape(str(s), quote=True)
