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
        deg = self.degree
        d = {
            "atoms": len(self.atoms),
            "formula": self.formula,
            "dimensionality": _DIM_TEXT[self.dimensionality],
            "motif": self.motif,
            # (a whole number rounds to itself: most components are lone anions, 0.0)
            "mean_bonds": deg if deg.is_integer() else round(deg, 3),
        }
        if self.cluster:
            d["cluster"] = self.cluster
        return d


# Dimensionality as to_dict gives it (the rank of a component's lattice, 0..3).
_DIM_TEXT = ("0D", "1D", "2D", "3D")


def periodic_components(n: int, bi, bj, shift) -> tuple[np.ndarray, dict[int, int]]:
    """Connected components of a periodic bond graph and the dimensionality of
    each: the rank of the lattice translations that connect an atom to its own
    images (Larsen et al., Phys. Rev. Materials 3, 034003 (2019)).

    Atoms are nodes 0..n-1; a bond joins atom bi[k] to the image of bj[k]
    shifted by shift[k] cells. Returns (component id per atom, {id: dim}).
    (ase's RDA class counts a finite cluster that crosses the cell boundary as
    two components, which is right for its histogram but not for naming motifs.)
    The graphs are small: plain Python lists and tuples walk them faster than
    numpy arrays would.
    """
    adj = _adjacency(n, np.asarray(bi).tolist(), np.asarray(bj).tolist(), np.asarray(shift).tolist())
    comp = [-1] * n
    seen = [False] * n
    offset: list = [None] * n
    dims: dict[int, int] = {}
    for start in range(n):
        if seen[start]:
            continue
        cid = len(dims)
        members, cycles = _walk(adj, start, seen, offset)  # (a lone atom: itself, no cycles, 0D)
        for k in members:
            comp[k] = cid
        dims[cid] = _rank(cycles)
    return np.array(comp, dtype=np.int64), dims


def _adjacency(n: int, bi: list[int], bj: list[int], shift: list) -> list[list[tuple[int, int, int, int]]]:
    """Neighbour lists of nodes 0..n-1 for `_walk`: a bond joining node bi[k]
    to the image of node bj[k] shifted by shift[k] cells gives bi[k] the entry
    (bj[k], x, y, z) and bj[k] the entry (bi[k], -x, -y, -z)."""
    adj: list[list[tuple[int, int, int, int]]] = [[] for _ in range(n)]
    for a, b, (x, y, z) in zip(bi, bj, shift):
        adj[a].append((b, x, y, z))
        adj[b].append((a, -x, -y, -z))
    return adj


def _walk(adj, start: int, seen: list, offset: list) -> tuple[list[int], set]:
    """The component of node `start`, walked depth first over `adj` (adj[a]:
    (b, x, y, z) for each bond of a to the image of b shifted by (x, y, z)
    cells): its nodes in the order reached, and the set of cycle vectors
    (the shifts between two ways of reaching a node), whose rank is the
    component's dimensionality. Marks each node reached in `seen` and
    writes its cell offset to `offset`."""
    seen[start] = True
    offset[start] = (0, 0, 0)
    stack = [start]
    members = [start]
    cycles = set()
    while stack:
        a = stack.pop()
        ox, oy, oz = offset[a]
        for b, x, y, z in adj[a]:
            o = (ox + x, oy + y, oz + z)
            if not seen[b]:
                seen[b] = True
                offset[b] = o
                stack.append(b)
                members.append(b)
            else:
                bx, by, bz = offset[b]
                d = (o[0] - bx, o[1] - by, o[2] - bz)
                if d != (0, 0, 0):
                    cycles.add(d)
    return members, cycles


def _rank(vectors: set[tuple[int, int, int]]) -> int:
    """Rank of a set of nonzero integer 3-vectors, exactly: 0 for none, 1 when
    all are parallel to the first, 3 when one leaves the plane of the first
    two independent ones, else 2."""
    if not vectors:
        return 0
    it = iter(vectors)
    ax, ay, az = next(it)
    normal = None
    for bx, by, bz in it:
        n = (ay * bz - az * by, az * bx - ax * bz, ax * by - ay * bx)
        if n != (0, 0, 0):
            normal = n
            break
    if normal is None:
        return 1
    nx, ny, nz = normal
    for vx, vy, vz in vectors:
        if nx * vx + ny * vy + nz * vz != 0:
            return 3
    return 2


def formula(numbers) -> str:
    """Element counts in atomic-number order: 'S2', 'Ga3Ge7'."""
    zs, counts = np.unique(numbers, return_counts=True)
    return _formula_text(dict(zip(zs.tolist(), counts.tolist())))


def _formula_text(per_z: dict[int, int]) -> str:
    """'Ga3Ge7' from {atomic number: count}, in atomic-number order."""
    syms = elements.symbols()
    return "".join(f"{syms[z]}{n if n > 1 else ''}" for z, n in sorted(per_z.items()))


def anion_components(crystal, contacts, count) -> list[Component]:
    """Connected components of the anion-anion bond graph (fully occupied
    view: every entry is a node), in order of their first atom."""
    # (x.nonzero()[0] is np.flatnonzero(x) for a 1-D array and
    # np.count_nonzero(x) > 0 is x.any(), both without numpy's Python-level
    # wrappers, which cost more than the work on these short arrays.)
    role = count.role
    anions = role.nonzero()[0]
    if anions.size == 0:
        return []
    atom_list = anions.tolist()
    z_list = crystal.numbers[anions].tolist()
    syms = elements.symbols()
    aa = count.aa_bond
    if not np.count_nonzero(aa):  # no anion-anion bond: every anion is a component of its own
        return [Component([a], 0, "isolated anion", syms[z], 0, 0.0) for a, z in zip(atom_list, z_list)]
    sel = contacts.bonded.nonzero()[0][aa]  # the anion-anion bonds among all contacts
    node = role.cumsum() - 1  # node number of each anion (its rank among the anions)
    n = anions.size
    adj = _adjacency(n, node[contacts.i[sel]].tolist(), node[contacts.j[sel]].tolist(), contacts.shift[sel].tolist())
    seen = [False] * n
    offset: list = [None] * n
    out = []
    # Components in order of their first node, each walked by `_walk` as
    # `periodic_components` walks it (the same cycle vectors, hence the same
    # dimensionality). A node's degree is the length of its neighbour list
    # (a bond to its own image counts at both ends), and a component's edges
    # half the sum.
    for start in range(n):
        if seen[start]:
            continue
        if not adj[start]:  # a lone anion: a component of its own, 0D
            seen[start] = True
            out.append(Component([atom_list[start]], 0, "isolated anion", syms[z_list[start]], 0, 0.0))
            continue
        members, cycles = _walk(adj, start, seen, offset)
        members.sort()
        deg = [len(adj[k]) for k in members]
        per_z: dict[int, int] = {}
        for k in members:
            zk = z_list[k]
            per_z[zk] = per_z.get(zk, 0) + 1
        edges = sum(deg) // 2
        comp = Component([atom_list[k] for k in members], _rank(cycles), "", _formula_text(per_z), edges,
                         sum(deg) / len(deg))
        comp.motif = _name(comp, deg)
        out.append(comp)
    return out


def _name(comp: Component, deg: list[int]) -> str:
    n = len(comp.atoms)
    lo, hi = min(deg), max(deg)
    if comp.dimensionality == 0:
        if n == 1:
            return "isolated anion"
        if n == 2:
            return "dimer"
        if lo == hi == 2:
            return f"{n}-membered ring"
        if n == 3 and sorted(deg) == [1, 1, 2]:
            return "trimer"
        if n == 4 and lo == hi == 3:
            return "tetrahedron"
        if hi <= 2:
            return f"{n}-atom chain fragment"
        if comp.edges == 3 * n - 6 and n >= 5 and lo >= 3:
            return f"{n}-vertex deltahedron"
        return f"{n}-atom cluster"
    if comp.dimensionality == 1:
        return "chain" if lo == hi == 2 else "ribbon or ladder"
    if comp.dimensionality == 2:
        if lo == hi == 3:
            return "three-connected layer"
        if lo == hi == 4:
            return "four-connected layer (square net)"
        return "layer"
    if lo == hi == 4:
        return "four-connected framework"
    if lo == hi == 3:
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
    # when a neighbour image (c, t) of a is also a neighbour of the image of
    # b at s, i.e. (c, t - s) is a neighbour of b.
    bl, jl, sl = np.asarray(bi).tolist(), np.asarray(bj).tolist(), np.asarray(shift).tolist()
    nbr: dict[int, set] = {}
    for a, b, (x, y, z) in zip(bl, jl, sl):
        nbr.setdefault(a, set()).add((b, x, y, z))
        nbr.setdefault(b, set()).add((a, -x, -y, -z))
    in_tri = np.zeros(len(bl), dtype=bool)
    for k, (a, b, (x, y, z)) in enumerate(zip(bl, jl, sl)):
        nb = nbr[b]
        for c, tx, ty, tz in nbr[a]:
            if (c, tx - x, ty - y, tz - z) in nb:
                in_tri[k] = True
                break
    return in_tri


def find_clusters(crystal, contacts, count, valence_of) -> list[Cluster]:
    """Deltahedral clusters: finite components of at least five anion atoms
    with at least three triangle edges each (anion-anion bonds in a
    three-membered ring), joined by those edges; counted by the Wade-Mingos
    rules (K. Wade, J. Chem. Soc. D 1971, 792): a closo n-vertex deltahedron
    needs n + 1 skeletal electron pairs, nido n + 2, arachno n + 3.

    Each vertex atom gives its valence electrons minus one per exo bond, or
    minus a lone pair (2) when it has no exo bond; the cations' electrons
    are shared among the clusters equally per vertex.
    """
    aa = count.aa_bond
    if not np.count_nonzero(aa):
        return []
    sel = contacts.bonded.nonzero()[0][aa]  # the anion-anion bonds among all contacts
    bi, bj = contacts.i[sel], contacts.j[sel]
    n = crystal.natoms
    # A vertex needs three triangle edges, so at least three bonds: with fewer
    # than five such atoms there is no cluster, and no need to look for
    # triangles (most structures end here).
    all_deg = np.bincount(bi, minlength=n) + np.bincount(bj, minlength=n)
    if np.count_nonzero(all_deg >= 3) < 5:
        return []
    sh = contacts.shift[sel]
    tri = triangle_edges(n, bi, bj, sh)
    if not tri.any():
        return []
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
