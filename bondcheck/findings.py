"""Finding types. Each is a small declared class: a slug, a severity, a message
template filled with the numbers of the case, and an explanation for
`bondcheck explain SLUG`.

A finding instance carries the sites it concerns and its evidence (a dict of
plain numbers and strings), so renderers never need to recompute anything.
"""
from __future__ import annotations

from typing import ClassVar

SEVERITIES = ("info", "warning", "error")


class Finding:
    slug: ClassVar[str] = ""
    severity: ClassVar[str] = "info"
    template: ClassVar[str] = ""
    title: ClassVar[str] = ""
    meaning: ClassVar[str] = ""
    fires_when: ClassVar[str] = ""
    next_steps: ClassVar[str] = ""
    # True when the finding explains why a count closes (it is a cause of
    # a consistent verdict rather than a problem).
    explains: ClassVar[bool] = False

    __slots__ = ("args", "sites", "evidence", "rank", "level")

    def __init__(self, sites=(), evidence=None, rank: float = 0.0, severity: str | None = None, **args):
        self.args = args
        self.sites = list(sites)
        self.evidence = dict(evidence or {})
        self.rank = rank
        assert severity is None or severity in SEVERITIES, severity
        # An instance may raise or lower its class's default severity.
        self.level = severity or self.severity

    @property
    def message(self) -> str:
        return self.template.format(**self.args)

    def to_dict(self) -> dict:
        return {
            "slug": self.slug,
            "severity": self.level,
            "message": self.message,
            "sites": self.sites,
            "evidence": self.evidence,
        }

    def __repr__(self) -> str:
        return f"<{self.slug}: {self.message}>"


_REGISTRY: dict[str, type[Finding]] = {}


def register(cls: type[Finding]) -> type[Finding]:
    assert cls.slug and cls.slug not in _REGISTRY, cls.slug
    assert cls.severity in SEVERITIES, cls.severity
    _REGISTRY[cls.slug] = cls
    return cls


def all_findings() -> dict[str, type[Finding]]:
    return dict(_REGISTRY)


def lookup(slug: str) -> type[Finding] | None:
    return _REGISTRY.get(slug)


# --------------------------------------------------------------------------
# Explanations of a closed count


@register
class LonePairs(Finding):
    slug = "lone-pairs"
    explains = True
    template = "{n} electrons per cell stay on {who} as ns2 lone pairs"
    title = "Lone pairs on p-block cations"
    meaning = (
        "Heavier p-block cations often keep their ns2 pair (Tl+, Sn2+, Pb2+, Sb3+, Bi3+, Te4+, I5+). "
        "Those two electrons are not given to the anions, and the count closes once they are set aside."
    )
    fires_when = "The residual is positive and lone pairs on p-block cations, at an oxidation state the element is known in, account for it."
    next_steps = "Look at the cation's coordination: a stereochemically active pair leaves a one-sided environment."


@register
class DElectrons(Finding):
    slug = "d-electrons"
    explains = True
    template = "{who} keeps nonbonding d electrons: {states}"
    title = "Nonbonding d electrons on transition-metal cations"
    meaning = (
        "A transition metal gives the anions only as many electrons as its oxidation state; "
        "the rest of its group-number electrons stay as nonbonding d electrons."
    )
    fires_when = "The residual is positive and d-block cations at known oxidation states keep exactly that many electrons."
    next_steps = "Check that the implied oxidation state fits the metal's coordination and bond lengths (bond valence sums)."


@register
class CationCationBonds(Finding):
    slug = "cation-cation-bonds"
    explains = True
    template = "{n} cation-cation bonds per cell ({pairs}) hold {e} electrons per anion"
    title = "Bonds between cations"
    meaning = (
        "Cations that bond to each other (Hg2 2+, In-In, Ga-Ga, Si-Si, metal-metal pairs) keep one electron "
        "per bond instead of passing it to the anions."
    )
    fires_when = "A contact between two non-electropositive cations passes the bond criterion and is not much longer than their bonds to anions."
    next_steps = "Compare the cation-cation distance with the element's single-bond length."


@register
class MultipleBonds(Finding):
    slug = "multiple-bonds"
    explains = True
    template = "short anion-anion contacts carry multiple bonds: {e} electrons per cell ({pairs})"
    title = "Multiple bonds at short contacts"
    meaning = (
        "A bond clearly shorter than the sum of single-bond radii has order above one (Pauling: "
        "d(n) = d(1) - 0.60 log10 n); each extra order counts as one more bond at each end."
    )
    fires_when = "The residual is negative and short anion-anion contacts, read as double or triple bonds, make up the deficit."
    next_steps = "Confirm the short distance is not an artefact of disorder or a wrong atom type."


@register
class PiBonds(Finding):
    slug = "pi-bonds"
    explains = True
    template = "{n} planar three-bonded anion sites per cell carry delocalised pi bonds"
    title = "Pi bonding in planar three-bonded nets"
    meaning = "Atoms with three bonds in a plane (graphite-like sheets, carbonate-like groups) use their fourth electron in a pi bond."
    fires_when = "The residual is negative and planar three-bonded anion sites account for it, one electron each."
    next_steps = "Check the planarity and that the bond lengths lie between single and double."


@register
class DivalentLanthanide(Finding):
    slug = "divalent-lanthanide"
    explains = True
    template = "{who} stays divalent and keeps one electron"
    title = "Divalent Sm, Eu or Yb"
    meaning = "Sm, Eu and Yb are often divalent (4f7 Eu2+, 4f14 Yb2+): they give two electrons, not three."
    fires_when = "The count closes only with the lanthanide at +2."
    next_steps = "Magnetic data or the lanthanide's bond lengths tell +2 from +3."


@register
class TetravalentLanthanide(Finding):
    slug = "tetravalent-lanthanide"
    explains = True
    template = "{who} at +4: a fourth electron given"
    title = "Tetravalent Ce, Pr or Tb"
    meaning = "Ce, Pr and Tb reach +4 beside oxide and fluoride anions (CeO2, Na2PrO3, TbO2): they give four electrons, not three."
    fires_when = "Every anion is O or F and the count closes only with the lanthanide at +4."
    next_steps = "Bond lengths (bond valence sums), magnetic data or XANES tell +4 from +3."


@register
class MixedValence(Finding):
    slug = "mixed-valence"
    explains = True
    template = "{who} takes a mixture of oxidation states (average {avg})"
    title = "Mixed valence on one site"
    meaning = "Atoms of one site take two oxidation states, so the count closes only on average."
    fires_when = "No single oxidation state per site closes the count, but a mixture on one site does."
    next_steps = "Look for a superstructure or charge order that would separate the two states."


@register
class OccupancyAverage(Finding):
    slug = "partial-occupancy"
    template = "the count uses occupancy-weighted averages over {n} partly occupied or mixed sites; {ordered}"
    title = "Counted over partial occupancies"
    meaning = "Partly occupied and mixed sites enter the count with their occupancies as weights, so every number is an average."
    fires_when = "Any site has an occupancy below one."
    next_steps = "An ordered model in a supercell gives integer counts; check that the refined occupancies sum to a charge-balanced formula."


# --------------------------------------------------------------------------
# Problems


@register
class Metallic(Finding):
    slug = "metallic"
    template = "{why}"
    title = "Metallic bonding"
    meaning = (
        "Octets cannot form: too few valence electrons per anion (VEC below 4) or many near-equidistant "
        "neighbours without a gap. The electron count does not apply in the 8-N sense; that is expected for metals and intermetallics."
    )
    fires_when = "VEC per anion is below 4, no element can take the anion role, anion sites have six or more homoatomic neighbours, group 13-14 anions have electrons left over, or there are two or more transition-metal atoms per anion."
    next_steps = "Nothing is wrong by itself; compare with known intermetallics of the same structure type."


@register
class ElectronExcess(Finding):
    slug = "electron-excess"
    severity = "warning"
    template = "{e} electrons per anion are left over that lone pairs and d electrons at known oxidation states cannot hold"
    title = "More electrons than the bonds need"
    meaning = (
        "After filling octets with the observed anion-anion bonds and setting aside what cations can keep, electrons remain. "
        "Typical reasons: hypervalent (3-centre) bonding, metallic behaviour, an anion site taken for a cation or a missing anion-anion bond."
    )
    fires_when = "The residual is positive and no assignment of lone pairs and d electrons closes it."
    next_steps = "Check anion-anion contacts just beyond the criterion, linear or square-planar anion environments, and the element assignment of each site."


@register
class ElectronDeficit(Finding):
    slug = "electron-deficit"
    severity = "warning"
    template = "{e} electrons per anion are missing for octets with the observed bonds"
    title = "Fewer electrons than the bonds need"
    meaning = (
        "The anions cannot complete their octets with the observed bonds: typical reasons are multiple bonds not "
        "recognised, an electron-deficient cluster, missing cations (or hydrogen), or an anion site that should be a cation."
    )
    fires_when = "The residual is negative and no multiple bonds explain it."
    next_steps = "Check for missing atoms (hydrogen above all), deltahedral clusters and the element assignment of each site."


@register
class InvalidSplit(Finding):
    slug = "unusual-split"
    severity = "info"
    template = "{note}"
    title = "Cation/anion split with hetero cation-cation bonds"
    meaning = "The split used leaves a p-block element as a cation bonded to another cation; no better split closes the count."
    fires_when = "Every candidate split either leaves such a bond or does not close."
    next_steps = "Try --anions to set the split by hand."


@register
class AmbiguousCutoff(Finding):
    slug = "ambiguous-cutoff"
    severity = "info"
    template = "the bond count at {n} site(s) changes within {pct}% of the bond criterion; the verdict holds for criterion changes of {rng}"
    title = "Bond count sensitive to the criterion"
    meaning = "A contact lies close to the bond criterion, so a slightly different criterion would count it differently."
    fires_when = "Scaling the criterion by a few percent adds or removes a bond at a site."
    next_steps = "Look at the contacts listed in the evidence: are they bonds? Compare with the gap ratios."


@register
class NothingToCount(Finding):
    slug = "nothing-to-count"
    template = "{why}"
    title = "No electron count applies"
    meaning = "The structure has no element that can take the anion role (a metal or intermetallic), so the 8-N rule has nothing to say."
    fires_when = "Only metals are present, or a single metallic element."
    next_steps = "Nothing; the verdict is not-applicable."


# --------------------------------------------------------------------------
# Deeper diagnosis


@register
class Hypervalent(Finding):
    slug = "hypervalent"
    template = "{who} has {n} anion neighbours where the 8-N rule allows {allowed}, {shape}, bond orders summing to {vsum}"
    title = "Hypervalent (three-centre, four-electron) bonding"
    meaning = (
        "An anion with more anion neighbours than 8-N allows, at lengthened distances and in a linear or square-planar "
        "arrangement, shares electron-rich three-centre bonds (linear I3-, Sb square nets). Each such bond has order "
        "about 1/2; Pauling's relation d(n) = d(1) - 0.60 log10 n turns the lengths into orders whose sum is the atom's valence."
    )
    fires_when = "An anion site has more anion-anion bonds than its neutral element makes, in a linear, T-shaped or square-planar arrangement, with bond orders below 0.85."
    next_steps = "This is a known bonding mode, not an error. Check that the long contacts are real and not a disorder artefact."


@register
class DeficientCluster(Finding):
    slug = "electron-deficient-cluster"
    template = "{n} deltahedral {formula} cluster(s) per cell: {pairs} skeletal electron pairs for {vertices} vertices, {verdict}"
    title = "Electron-deficient deltahedral clusters (Wade-Mingos count)"
    meaning = (
        "Anion atoms with more than four homoatomic neighbours forming deltahedra (B6, B12, Ga and In clusters) bond by "
        "multicentre skeletal orbitals, not two-centre bonds. K. Wade's rules (1971): a closo n-vertex deltahedron needs "
        "n + 1 skeletal electron pairs, nido n + 2, arachno n + 3."
    )
    fires_when = "The anion-anion bond graph has closed clusters of edges that all lie in triangles."
    next_steps = "If the cluster count does not close, check the cations' count and occupancy and the cluster's vertex count."


@register
class LonePairActivity(Finding):
    slug = "lone-pair-activity"
    template = "{who}: the lone pair is {state} (cation {offset} A off the centroid of its neighbours)"
    title = "Stereochemical activity of a lone pair"
    meaning = "An active ns2 pair pushes the cation off the centre of its coordination polyhedron; an inert pair leaves it centred."
    fires_when = "The count sets a lone pair aside on a p-block cation."
    next_steps = "An active pair with a centred cation (or the reverse) can mean a wrong element or a missed disorder."


@register
class OddOxidationState(Finding):
    slug = "implausible-oxidation-state"
    severity = "error"
    template = "the count implies {who} at {ox}, {why}"
    title = "Implausible oxidation state"
    meaning = "The electrons left over (or missing) would put a transition metal at an oxidation state that is negative, above its group number or unknown."
    fires_when = "The count does not close and the implied oxidation state of the d-block cations is not a known one."
    next_steps = "Check the metal's element assignment, its occupancy and whether anion atoms are missing."


@register
class Misassigned(Finding):
    slug = "possibly-misassigned-element"
    severity = "warning"
    template = "site {site} ({old}): as {new} the count closes{extra}"
    title = "Possibly misassigned element"
    meaning = (
        "Changing the element at one crystallographic site to a neighbour in the same period (Ga/Ge, Al/Si, In/Sn, Sb/Te, "
        "Tl/Pb/Bi, N/O, O/F) or to a mixed occupancy closes the electron count. X-ray scattering hardly tells such "
        "neighbours apart, so a mistyped site is a common error."
    )
    fires_when = "The count does not close as refined but closes with one site's element changed by one in atomic number, or mixed."
    next_steps = "Check the site's displacement parameters, bond lengths and the synthesis; anomalous scattering or neutron data can settle it."


@register
class MissingAtoms(Finding):
    slug = "possibly-missing-atoms"
    severity = "warning"
    template = "{what} per formula unit would close the count"
    title = "Possibly missing or extra atoms"
    meaning = "The residual equals the electrons of a whole number of cations or anions per formula unit: atoms may be missing from the model, or extra."
    fires_when = "The count does not close and the residual per formula unit is a whole multiple of one element's electrons."
    next_steps = "Look at the difference map for unassigned density, and at the refined formula against the analysis."


@register
class MissingHydrogen(Finding):
    slug = "missing-hydrogen"
    severity = "warning"
    template = "{n} H per formula unit ({per}) would close the count; the file has no hydrogen"
    title = "Possibly missing hydrogen"
    meaning = "O or N atoms are electron-short by whole electrons and the model has no H: hydroxide, water or amine hydrogens were probably not located."
    fires_when = "The residual is negative by a whole number of electrons per formula unit, at most two per O or N atom, the anions include O or N, and no H is in the file."
    next_steps = "Locate H in a difference map or place it geometrically; check hydrogen-bond distances between O atoms."


@register
class FileRepaired(Finding):
    slug = "file-repaired"
    template = "the reader mended the file: {what}"
    title = "Input mended while reading"
    meaning = (
        "Files from the wild often carry small slips: an unclosed quote, a banner line before the first data block, "
        "a repeated data-block name or tag, an atom listed twice, an incomplete list of symmetry operators. The reader "
        "mends these and says so, because the model checked is then not byte for byte what the file says."
    )
    fires_when = "Reading needed one of these repairs."
    next_steps = "Fix the file at its source, so that other programs read the same structure."
