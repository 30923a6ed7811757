"""The anion substructure: connected components, their dimensionality and a
plain name for common motifs; deltahedral clusters and their Wade-Mingos
skeletal electron count.

Dimensionality uses the rank method of Larsen et al., Phys. Rev. Materials 3,
034003 (2019), on our own bond graph.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import elements


@dataclass(slots=True)
class Component:
    atoms: list[int]  # atom indices in the cell
    dimensionality: int
    motif: str
    formula: str
    edges: int  # bonds inside one repeat of the component (per cell for 1-3D)
    degree: float  # mean anion-anion bonds per atom
    cluster: dict | None = None  # deltahedral cluster data when it is one

    def to_dict(self) -> dict:
        d = {
            "atoms": len(self.atoms),
            "formula": self.formula,
            "dimensionality": f"{self.dimensionality}D",
            "motif": self.motif,
            "mean_bonds": round(self.degree, 3),
        }
        if self.cluster:
            d["cluster"] = self.cluster
        return d


def periodic_components(n: int, bi, bj, shift) -> tuple[np.ndarray, dict[int, int]]:
    """Connected components of a periodic bond graph and the dimensionality of
    each: the rank of the lattice translations that connect an atom to its own
    images (Larsen et al., Phys. Rev. Materials 3, 034003 (2019)).

    Atoms are nodes 0..n-1; a bond joins atom bi[k] to the image of bj[k]
    shifted by shift[k] cells. Returns (component id per atom, {id: dim}).
    (ase's RDA class counts a finite cluster that crosses the cell boundary as
    two components, which is right for its histogram but not for naming motifs.)
    """
    adj: list[list[tuple[int, tuple]]] = [[] for _ in range(n)]
    for a, b, s in zip(bi, bj, shift):
        s = (int(s[0]), int(s[1]), int(s[2]))
        adj[int(a)].append((int(b), s))
        adj[int(b)].append((int(a), (-s[0], -s[1], -s[2])))
    comp = -np.ones(n, dtype=np.int64)
    offset = np.zeros((n, 3), dtype=np.int64)
    dims: dict[int, int] = {}
    cid = 0
    for start in range(n):
        if comp[start] >= 0:
            continue
        comp[start] = cid
        offset[start] = 0
        stack = [start]
        cycles = []
        while stack:
            a = stack.pop()
            for b, s in adj[a]:
                o = offset[a] + s
                if comp[b] < 0:
                    comp[b] = cid
                    offset[b] = o
                    stack.append(b)
                else:
                    d = o - offset[b]
                    if d.any():
                        cycles.append(d)
        dims[cid] = int(np.linalg.matrix_rank(np.array(cycles))) if cycles else 0
        cid += 1
    return comp, dims


def formula(numbers) -> str:
    """Element counts in atomic-number order: 'S2', 'Ga3Ge7'."""
    syms = elements.symbols()
    zs, counts = np.unique(numbers, return_counts=True)
    return "".join(f"{syms[z]}{c if c > 1 else ''}" for z, c in zip(zs, counts))


def anion_components(crystal, contacts, count) -> list[Component]:
    """Connected components of the anion-anion bond graph (fully occupied
    view: every entry is a node)."""
    role = count.role
    anions = np.flatnonzero(role)
    if anions.size == 0:
        return []
    index = -np.ones(crystal.natoms, dtype=np.int64)
    index[anions] = np.arange(anions.size)
    b = contacts.bonded
    bi, bj, sh = contacts.i[b][count.aa_bond], contacts.j[b][count.aa_bond], contacts.shift[b][count.aa_bond]
    comp_of, dims = periodic_components(anions.size, index[bi], index[bj], sh)
    ncomp = len(dims)
    deg = np.bincount(index[bi], minlength=anions.size) + np.bincount(index[bj], minlength=anions.size)
    edges = np.bincount(comp_of[index[bi]], minlength=ncomp) if bi.size else np.zeros(ncomp, dtype=np.int64)
    # Formula of every component at once: counts per (component, element).
    syms = elements.symbols()
    z = crystal.numbers[anions]
    key, counts = np.unique(comp_of * 128 + z, return_counts=True)
    formulas = [""] * ncomp
    for k, n in zip(key.tolist(), counts.tolist()):
        formulas[k // 128] += f"{syms[k % 128]}{n if n > 1 else ''}"
    order = np.argsort(comp_of, kind="stable")
    bounds = np.searchsorted(comp_of[order], np.arange(ncomp + 1))
    out = []
    for cid in range(ncomp):
        members = order[bounds[cid]:bounds[cid + 1]]
        d = deg[members]
        comp = Component(anions[members].tolist(), int(dims[cid]), "", formulas[cid], int(edges[cid]), float(d.mean()))
        comp.motif = _name(comp, d)
        out.append(comp)
    return out


def _name(comp: Component, deg: np.ndarray) -> str:
    n = len(comp.atoms)
    if comp.dimensionality == 0:
        if n == 1:
            return "isolated anion"
        if n == 2:
            return "dimer"
        if np.all(deg == 2):
            return f"{n}-membered ring"
        if n == 3 and sorted(deg.tolist()) == [1, 1, 2]:
            return "trimer"
        if n == 4 and np.all(deg == 3):
            return "tetrahedron"
        if np.all(deg <= 2):
            return f"{n}-atom chain fragment"
        if comp.edges == 3 * n - 6 and n >= 5 and np.all(deg >= 3):
            return f"{n}-vertex deltahedron"
        return f"{n}-atom cluster"
    if comp.dimensionality == 1:
        return "chain" if np.all(deg == 2) else "ribbon or ladder"
    if comp.dimensionality == 2:
        if np.all(deg == 3):
            return "three-connected layer"
        if np.all(deg == 4):
            return "four-connected layer (square net)"
        return "layer"
    if np.all(deg == 4):
        return "four-connected framework"
    if np.all(deg == 3):
        return "three-connected framework"
    return "framework"


def describe(components: list[Component]) -> str:
    """'dimer (S2) x4, framework (GaGe) x1 per cell' style summary."""
    groups: dict[tuple[str, str, int], int] = {}
    for c in components:
        key = (c.motif, c.formula, c.dimensionality)
        groups[key] = groups.get(key, 0) + 1
    parts = []
    for (motif, formula, dim), k in sorted(groups.items(), key=lambda t: (t[0][2], -t[1])):
        parts.append(f"{motif} {formula} ({dim}D) x{k}")
    return ", ".join(parts) + " per cell"


# ---------------------------------------------------------------------------
# Deltahedral clusters


@dataclass(slots=True)
class Cluster:
    atoms: list[int]
    vertices: int
    edges: int
    exo_bonds: int
    skeletal_electrons: float
    kind: str  # closo / nido / arachno / none
    expected: dict = field(default_factory=dict)


def triangle_edges(n_atoms: int, bi, bj, shift) -> np.ndarray:
    """Bonds that lie in at least one three-membered ring of the periodic
    bond graph (the edges of deltahedra)."""
    # Neighbour sets with cell shifts; a bond a -> (b, s) lies in a triangle
    # when a and the image of b at s share a neighbour image.
    nbr: dict[int, set] = {}
    for k, (a, b, s) in enumerate(zip(bi, bj, shift)):
        s = tuple(int(x) for x in s)
        nbr.setdefault(int(a), set()).add((int(b), s, k))
        nbr.setdefault(int(b), set()).add((int(a), tuple(-x for x in s), k))
    in_tri = np.zeros(len(bi), dtype=bool)
    for k, (a, b, s) in enumerate(zip(bi, bj, shift)):
        a, b, s = int(a), int(b), tuple(int(x) for x in s)
        na = {(c, t) for c, t, _ in nbr.get(a, ())}
        # neighbours of b, moved to b's image at s
        nb = {(c, tuple(x + y for x, y in zip(t, s))) for c, t, _ in nbr.get(b, ())}
        if na & nb:
            in_tri[k] = True
    return in_tri


def find_clusters(crystal, contacts, count, valence_of) -> list[Cluster]:
    """Deltahedral clusters of anion atoms with more than four homoatomic
    neighbours or at least three triangle edges, counted by the Wade-Mingos
    rules (K. Wade, J. Chem. Soc. D 1971, 792): a closo n-vertex deltahedron
    needs n + 1 skeletal electron pairs, nido n + 2, arachno n + 3.

    Each vertex atom gives its valence electrons minus one per exo bond, or
    minus a lone pair (2) when it has no exo bond; the cations' electrons
    are shared among the clusters equally per vertex.
    """
    b = contacts.bonded
    aa = count.aa_bond
    bi, bj, sh = contacts.i[b][aa], contacts.j[b][aa], contacts.shift[b][aa]
    if bi.size == 0:
        return []
    tri = triangle_edges(crystal.natoms, bi, bj, sh)
    if not tri.any():
        return []
    n = crystal.natoms
    tri_deg = np.zeros(n)
    np.add.at(tri_deg, bi[tri], 1)
    np.add.at(tri_deg, bj[tri], 1)
    # Components of the triangle-edge subgraph, non-periodic (a cluster must
    # close on itself; periodic triangle nets are metallic layers instead).
    verts = np.flatnonzero(tri_deg >= 3)
    if verts.size < 5:
        return []
    idx = -np.ones(n, dtype=np.int64)
    idx[verts] = np.arange(verts.size)
    keep = tri & (idx[bi] >= 0) & (idx[bj] >= 0)
    comp_of, dims = periodic_components(verts.size, idx[bi[keep]], idx[bj[keep]], sh[keep])
    all_deg = np.zeros(n)
    np.add.at(all_deg, bi, 1)
    np.add.at(all_deg, bj, 1)
    clusters = []
    for cid in np.unique(comp_of):
        if dims[cid] != 0:
            continue
        members = verts[comp_of == cid]
        if members.size < 5:
            continue
        inside = np.isin(bi, members) & np.isin(bj, members) & keep
        edges = int(np.sum(inside))
        exo = all_deg[members] - tri_deg[members]
        contrib = 0.0
        for k, x in zip(members, exo):
            v = valence_of(int(k))
            contrib += v - x if x >= 1 else v - 2
        clusters.append(Cluster(members.tolist(), int(members.size), edges, int(np.sum(exo)), contrib, "none"))
    return clusters


def wade(clusters: list[Cluster], electrons_to_clusters: float) -> list[Cluster]:
    """Add the cations' electrons (shared per vertex) and classify."""
    total_vertices = sum(c.vertices for c in clusters) or 1
    for c in clusters:
        e = c.skeletal_electrons + electrons_to_clusters * c.vertices / total_vertices
        c.skeletal_electrons = e
        pairs = e / 2
        n = c.vertices
        c.expected = {"closo": n + 1, "nido": n + 2, "arachno": n + 3}
        c.kind = "none"
        for kind, want in c.expected.items():
            if abs(pairs - want) < 0.05:
                c.kind = kind
                break
    return clusters
