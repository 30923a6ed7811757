"""Gating a structure repository: configuration, baseline, changed files,
JUnit/SARIF/Markdown reports and exit codes.

Structures are real: ase's bundled COD mineral CIFs (moissanite 3C-SiC COD
1010995, cristobalite SiO2 COD 9017338), pymatgen's bundled structures
written as CIF with pymatgen's CifWriter, and the elemental crystals of
ase.collections.dcdft (fcc Pb, simple cubic alpha-Po) as metallic phases that
a group would accept as known exceptions. The misassigned structure is
cristobalite with its O site typed F (Z + 1): SiF2 in a silica framework has
one electron per anion more than the octets need (common practice, no
source), and the current chemistry reports it with a warning.

The SARIF output is validated against the published SARIF 2.1.0 schema kept
in tests/data/sarif (see the README there for its origin).
"""
from __future__ import annotations

import json
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from bondcheck import cli
from bondcheck.config import ConfigError, discover, load, parse
from bondcheck.gate import SEVERITY_RANK, fingerprint

SCHEMA = Path(__file__).resolve().parent / "data" / "sarif" / "sarif-schema-2.1.0.json"
ACCEPT_REASON = "fcc lead is a metal: no octets to complete (dcdft Pb)"

needs_git = pytest.mark.skipif(shutil.which("git") is None, reason="git is not installed")


# --------------------------------------------------------------------------
# helpers


def git(repo: Path, *args: str) -> str:
    cmd = ["git", "-c", "user.name=Halden Lab CI", "-c", "user.email=ci@halden-lab.example", "-c", "commit.gpgsign=false", *args]
    return subprocess.run(cmd, cwd=repo, check=True, capture_output=True, text=True).stdout


def known_findings(path: Path) -> set[str]:
    """Slugs of the findings at warning or above that the current chemistry
    reports for a structure (the gate's bookkeeping is tested against them)."""
    from bondcheck.api import check

    return {f.slug for f in check(path).findings if SEVERITY_RANK[f.severity] >= SEVERITY_RANK["warning"]}


def bondcheck(monkeypatch, repo: Path, *argv: str) -> int:
    """Run the command line in-process, with 'gate' registered."""
    monkeypatch.chdir(repo)
    if "gate" not in cli.COMMANDS:
        monkeypatch.setattr(cli, "COMMANDS", cli.COMMANDS + ("gate",))
    return cli.main(list(argv))


def misassigned_cristobalite(minerals: Path) -> str:
    text = (minerals / "cod_9017338.cif").read_text()
    assert "\nO 0.23900 0.10410 0.17870" in text
    return text.replace("\nO 0.23900 0.10410 0.17870", "\nF 0.23900 0.10410 0.17870")


def write_dcdft_cif(name: str, dest: Path) -> None:
    from ase.collections import dcdft
    from ase.io import write

    write(str(dest), dcdft[name], format="cif")


def write_pymatgen_cif(pmg_structures: Path, name: str, dest: Path) -> None:
    from pymatgen.core import Structure
    from pymatgen.io.cif import CifWriter

    CifWriter(Structure.from_file(str(pmg_structures / f"{name}.json"))).write_file(str(dest))


def sarif_validator():
    import jsonschema

    schema = json.loads(SCHEMA.read_text())
    cls = jsonschema.validators.validator_for(schema)
    cls.check_schema(schema)
    return cls(schema, format_checker=cls.FORMAT_CHECKER)


@pytest.fixture(scope="module")
def repo_files(tmp_path_factory, minerals, pmg_structures):
    """Real structures for the repository, made once: name -> bytes."""
    d = tmp_path_factory.mktemp("structures")
    write_dcdft_cif("Pb", d / "lead.cif")
    write_dcdft_cif("Po", d / "polonium.cif")
    write_pymatgen_cif(pmg_structures, "TiO2", d / "rutile.cif")
    write_pymatgen_cif(pmg_structures, "TlBiSe2", d / "tlbise2.cif")
    return {
        "structures/moissanite.cif": (minerals / "cod_1010995.cif").read_bytes(),
        "structures/cristobalite.cif": (minerals / "cod_9017338.cif").read_bytes(),
        "structures/rutile.cif": (d / "rutile.cif").read_bytes(),
        "structures/tlbise2.cif": (d / "tlbise2.cif").read_bytes(),
        "structures/metals/lead.cif": (d / "lead.cif").read_bytes(),
        "structures/metals/polonium.cif": (d / "polonium.cif").read_bytes(),
    }


CONFIG = f"""
paths = ["structures"]
exclude = ["structures/drafts/*"]
fail-on = "warning"

[[accept]]
paths = ["structures/metals/lead.cif"]
reason = "{ACCEPT_REASON}"
"""


@pytest.fixture()
def repo(tmp_path, repo_files, monkeypatch):
    """A git repository of real structures, committed, with a configuration."""
    r = tmp_path / "halden-structures"
    for rel, data in repo_files.items():
        (r / rel).parent.mkdir(parents=True, exist_ok=True)
        (r / rel).write_bytes(data)
    (r / "bondcheck.toml").write_text(CONFIG)
    git(r, "init", "-q")
    git(r, "add", ".")
    git(r, "commit", "-q", "-m", "refined structures of the Halden lab")
    return r


# --------------------------------------------------------------------------
# the premise: an open count always carries a finding that can fail the gate


def test_mismatch_always_carries_a_warning(minerals, repo_files, tmp_path):
    from bondcheck.api import check

    bad = tmp_path / "cristobalite-f.cif"
    bad.write_text(misassigned_cristobalite(minerals))
    lead = tmp_path / "lead.cif"
    lead.write_bytes(repo_files["structures/metals/lead.cif"])
    for path in (bad, lead):
        r = check(path)
        assert r.verdict == "mismatch", path.name
        assert any(SEVERITY_RANK[f.severity] >= SEVERITY_RANK["warning"] for f in r.findings), path.name
    # the unaltered cristobalite closes: Si4+ and O2-, two Si-O-Si links per O
    assert check(minerals / "cod_9017338.cif").verdict == "consistent"


# --------------------------------------------------------------------------
# end to end in a git repository


@needs_git
def test_end_to_end_changed_since(repo, minerals, monkeypatch, capsys):
    base = git(repo, "rev-parse", "HEAD").strip()

    # the baseline records polonium's findings; lead's are accepted by the configuration
    po = known_findings(repo / "structures" / "metals" / "polonium.cif")
    assert "electron-excess" in po  # alpha-Po: 6 valence electrons, 6 Po neighbours
    assert known_findings(repo / "structures" / "metals" / "lead.cif")
    assert bondcheck(monkeypatch, repo, "baseline", "write") == 0
    entries = json.loads((repo / "bondcheck-baseline.json").read_text())["entries"]
    assert {(e["file"], e["finding"]) for e in entries} == {("structures/metals/polonium.cif", s) for s in po}
    git(repo, "add", "bondcheck-baseline.json")
    git(repo, "commit", "-q", "-m", "baseline")
    capsys.readouterr()

    # the whole repository passes: consistent files clean, known findings quiet
    assert bondcheck(monkeypatch, repo, "gate") == 0
    out = capsys.readouterr().out
    assert "passed (exit 0)" in out
    n_lead = len(known_findings(repo / "structures" / "metals" / "lead.cif"))
    assert f"{n_lead} accepted, {len(po)} in the baseline" in out

    # a new file with a misassigned element (untracked), an accepted file
    # re-refined (cell edge changed), a baselined file with a comment added
    (repo / "structures" / "cristobalite-f.cif").write_text(misassigned_cristobalite(minerals))
    lead = repo / "structures" / "metals" / "lead.cif"
    text = lead.read_text()
    assert "_cell_length_a       5.043858" in text
    lead.write_text(text.replace("_cell_length_a       5.043858", "_cell_length_a       5.0451"))
    polonium = repo / "structures" / "metals" / "polonium.cif"
    polonium.write_text("# re-checked by the Halden lab, sample HL-0042\n" + polonium.read_text())
    (repo / "structures" / "drafts").mkdir()
    (repo / "structures" / "drafts" / "wip.cif").write_text(misassigned_cristobalite(minerals))

    code = bondcheck(monkeypatch, repo, "gate", "--changed-since", base,
                     "--junit", "gate.xml", "--sarif", "gate.sarif", "--markdown", "gate.md")
    out = capsys.readouterr().out
    assert code == 1, out
    assert "FAIL  structures/cristobalite-f.cif" in out

    # JUnit: one test case per changed structure, only the new file fails
    tree = ET.parse(repo / "gate.xml")
    cases = tree.getroot().findall(".//testcase")
    by_file = {c.get("classname"): c for c in cases}
    assert set(by_file) == {"structures/cristobalite-f.cif", "structures/metals/lead.cif", "structures/metals/polonium.cif"}
    assert len(cases) == 3
    assert by_file["structures/cristobalite-f.cif"].find("failure") is not None
    assert by_file["structures/metals/lead.cif"].find("failure") is None
    assert by_file["structures/metals/polonium.cif"].find("failure") is None
    assert ACCEPT_REASON in by_file["structures/metals/lead.cif"].find("system-out").text
    suite = tree.getroot().find("testsuite")
    assert (suite.get("tests"), suite.get("failures"), suite.get("errors")) == ("3", "1", "0")

    # SARIF: schema-valid; the new finding unsuppressed, the known ones suppressed
    doc = json.loads((repo / "gate.sarif").read_text())
    errors = sorted(sarif_validator().iter_errors(doc), key=str)
    assert not errors, errors[0]
    run = doc["runs"][0]
    results = run["results"]
    by_uri = {}
    for res in results:
        by_uri.setdefault(res["locations"][0]["physicalLocation"]["artifactLocation"]["uri"], []).append(res)
    new = by_uri["structures/cristobalite-f.cif"]
    assert new and all("suppressions" not in r and r["baselineState"] == "new" for r in new)
    assert any(r["level"] in ("warning", "error") for r in new)
    assert by_uri["structures/metals/lead.cif"]
    assert all([s["justification"] for s in r["suppressions"]] == [ACCEPT_REASON] for r in by_uri["structures/metals/lead.cif"])
    assert all(r["baselineState"] == "unchanged" and r["suppressions"] for r in by_uri["structures/metals/polonium.cif"])
    rule_ids = [r["id"] for r in run["tool"]["driver"]["rules"]]
    for res in results:
        assert rule_ids[res["ruleIndex"]] == res["ruleId"]
    assert run["invocations"][0]["exitCode"] == 1

    md = (repo / "gate.md").read_text()
    assert "`structures/cristobalite-f.cif`" in md and f"accepted: {ACCEPT_REASON}" in md
    assert "wip.cif" not in md  # excluded by the configuration

    # the same once committed: git diff against the merge base sees committed changes
    git(repo, "add", "structures")
    git(repo, "commit", "-q", "-m", "new sample, re-refined lead")
    assert bondcheck(monkeypatch, repo, "gate", "--changed-since", base) == 1
    capsys.readouterr()
    # and nothing changed since HEAD: nothing to check, the gate passes
    assert bondcheck(monkeypatch, repo, "gate", "--changed-since", "HEAD") == 0
    assert "0 structure(s) in 0 file(s)" in capsys.readouterr().out

    # the failing severity is configurable: warnings pass at fail-on error
    assert bondcheck(monkeypatch, repo, "gate", "--changed-since", base, "--fail-on", "error") == 0


@needs_git
def test_structural_change_reopens_a_baselined_finding(repo, monkeypatch, capsys):
    assert bondcheck(monkeypatch, repo, "baseline", "write") == 0
    polonium = repo / "structures" / "metals" / "polonium.cif"
    text = polonium.read_text()
    assert "_cell_length_a       3.348179" in text
    # a rename keeps the fingerprint, hence the baseline entry
    git(repo, "mv", "structures/metals/polonium.cif", "structures/metals/alpha-po.cif")
    capsys.readouterr()
    assert bondcheck(monkeypatch, repo, "gate", "--changed-since", "HEAD") == 0
    assert "in the baseline" in capsys.readouterr().out
    # moving the structure (a new cell edge) re-opens the finding
    moved = repo / "structures" / "metals" / "alpha-po.cif"
    moved.write_text(text.replace("_cell_length_a       3.348179", "_cell_length_a       3.3591"))
    assert bondcheck(monkeypatch, repo, "gate", "--changed-since", "HEAD") == 1
    out = capsys.readouterr().out
    n = len(known_findings(moved))
    assert out.count("[NEW]") == n and f"{n} baseline entr{'y' if n == 1 else 'ies'} no longer found" in out
    # prune drops the stale entry; write records the new one
    assert bondcheck(monkeypatch, repo, "baseline", "prune") == 0
    assert json.loads((repo / "bondcheck-baseline.json").read_text())["entries"] == []
    assert bondcheck(monkeypatch, repo, "baseline", "write") == 0
    assert bondcheck(monkeypatch, repo, "gate") == 0
    assert bondcheck(monkeypatch, repo, "baseline", "show") == 0
    assert "structures/metals/alpha-po.cif" in capsys.readouterr().out


@needs_git
def test_no_baseline_makes_every_finding_new(repo, monkeypatch, capsys):
    assert bondcheck(monkeypatch, repo, "baseline", "write") == 0
    assert bondcheck(monkeypatch, repo, "gate") == 0
    capsys.readouterr()
    assert bondcheck(monkeypatch, repo, "gate", "--no-baseline", "--format", "json") == 1
    doc = json.loads(capsys.readouterr().out)
    failing = {(s["file"], i["slug"]) for s in doc["structures"] for i in s["items"] if i["failing"]}
    po = known_findings(repo / "structures" / "metals" / "polonium.cif")
    assert po and failing == {("structures/metals/polonium.cif", slug) for slug in po}
    quiet = {(s["file"], i["state"], i["reason"]) for s in doc["structures"] for i in s["items"] if not i["failing"]}
    assert quiet == {("structures/metals/lead.cif", "accepted", ACCEPT_REASON)}


@needs_git
def test_acceptance_by_finding(repo, monkeypatch, capsys):
    """An acceptance naming findings covers those and no others."""
    lead = known_findings(repo / "structures" / "metals" / "lead.cif")
    po = known_findings(repo / "structures" / "metals" / "polonium.cif")
    assert lead and po and "electron-deficit" not in lead | po
    toml = 'paths = ["structures"]\n[[accept]]\nfindings = [%s]\nreason = "metals of the Halden collection"\n'
    (repo / "bondcheck.toml").write_text(toml % ", ".join(f'"{s}"' for s in sorted(lead | po)))
    assert bondcheck(monkeypatch, repo, "gate") == 0
    (repo / "bondcheck.toml").write_text(toml % '"electron-deficit"')
    assert bondcheck(monkeypatch, repo, "gate") == 1
    (repo / "bondcheck.toml").write_text(toml % '"electron-deficit"' + '[[accept]]\npaths = ["structures/metals"]\nreason = "metals"\n')
    capsys.readouterr()
    assert bondcheck(monkeypatch, repo, "gate") == 0
    assert "acceptances that matched nothing: accept[1]" in capsys.readouterr().out


@needs_git
def test_unreadable_inputs_exit_3_or_become_findings(repo, monkeypatch, capsys):
    # a CIF cut off in the middle of its atom loop
    text = (repo / "structures" / "cristobalite.cif").read_text()
    cut = text[: text.index("Si 0.30070 0.30070") + 12]
    (repo / "structures" / "truncated.cif").write_text(cut)
    assert bondcheck(monkeypatch, repo, "gate", "--no-baseline", "--fail-on", "error", "--junit", "g.xml") == 3
    err = ET.parse(repo / "g.xml").getroot().findall(".//testcase/error")
    assert len(err) == 1 and err[0].get("type") == "unreadable-input"
    capsys.readouterr()
    assert bondcheck(monkeypatch, repo, "gate", "--no-baseline", "--fail-on", "error", "--unreadable", "finding",
                     "--format", "sarif") == 1
    doc = json.loads(capsys.readouterr().out)
    assert not list(sarif_validator().iter_errors(doc))
    assert [r["ruleId"] for r in doc["runs"][0]["results"] if r["level"] == "error"] == ["unreadable-input"]
    # named files (as a pre-commit hook passes them): a missing one is unreadable too
    assert bondcheck(monkeypatch, repo, "gate", "structures/moissanite.cif", "structures/gone.cif") == 3
    assert bondcheck(monkeypatch, repo, "gate", "structures/moissanite.cif", "structures/cristobalite.cif") == 0


@needs_git
def test_changed_files_from_git(repo, minerals):
    from bondcheck.gate import GateError, changed_files

    base = git(repo, "rev-parse", "HEAD").strip()
    (repo / "structures" / "cristobalite.cif").write_text("# edited\n" + (repo / "structures" / "cristobalite.cif").read_text())
    (repo / "structures" / "new.cif").write_text(misassigned_cristobalite(minerals))
    (repo / ".gitignore").write_text("scratch/\n")
    (repo / "scratch").mkdir()
    (repo / "scratch" / "ignored.cif").write_text("data_x\n")
    git(repo, "rm", "-q", "structures/rutile.cif")
    got = {p.relative_to(repo).as_posix() for p in changed_files(base, repo)}
    assert got == {"structures/cristobalite.cif", "structures/new.cif", ".gitignore"}
    with pytest.raises(GateError, match="unknown git reference"):
        changed_files("no-such-branch", repo)


def test_changed_since_outside_git(tmp_path, monkeypatch, capsys):
    (tmp_path / "bondcheck.toml").write_text("")
    assert bondcheck(monkeypatch, tmp_path, "gate", "--changed-since", "HEAD") == 2
    assert "bondcheck gate:" in capsys.readouterr().err


# --------------------------------------------------------------------------
# fingerprints


def test_fingerprint_ignores_layout_not_structure(minerals):
    from bondcheck.read import read_cif_bytes

    text = (minerals / "cod_9017338.cif").read_text()
    fp = fingerprint(read_cif_bytes(text, "a.cif")[0])
    # comments, publication fields and the order of the atom rows do not matter
    shuffled = text.replace(
        "Si 0.30070 0.30070 0.00000 0.03456\nO 0.23900 0.10410 0.17870 0.01869",
        "O 0.23900 0.10410 0.17870 0.01869\nSi 0.30070 0.30070 0.00000 0.03456",
    )
    assert shuffled != text
    assert fingerprint(read_cif_bytes("# sample HL-0007\n" + shuffled, "b.cif")[0]) == fp
    # an element or a coordinate does
    assert fingerprint(read_cif_bytes(misassigned_cristobalite(minerals), "c.cif")[0]) != fp
    assert fingerprint(read_cif_bytes(text.replace("0.23900 0.10410", "0.23950 0.10410"), "d.cif")[0]) != fp


# --------------------------------------------------------------------------
# configuration


def test_discovery_upward(tmp_path):
    deep = tmp_path / "a" / "b" / "c"
    deep.mkdir(parents=True)
    assert discover(deep) is None
    (tmp_path / "a" / "pyproject.toml").write_text('[project]\nname = "x"\n')
    assert discover(deep) is None  # a pyproject.toml without [tool.bondcheck] does not count
    (tmp_path / "a" / "pyproject.toml").write_text('[project]\nname = "x"\n[tool.bondcheck]\nfail-on = "error"\n')
    assert discover(deep) == tmp_path / "a" / "pyproject.toml"
    cfg = load(start=deep)
    assert cfg.fail_on == "error" and cfg.root == tmp_path / "a"
    (tmp_path / "a" / "b" / "bondcheck.toml").write_text('fail-on = "info"\n')
    assert discover(deep) == tmp_path / "a" / "b" / "bondcheck.toml"
    assert load(start=deep).fail_on == "info"


def test_settings_map_onto_options(tmp_path):
    from bondcheck.api import Options
    from bondcheck.bonds import Criterion

    (tmp_path / "zintl").mkdir()
    cfg = parse(
        {
            "anions": ["Sb"],
            "valence": {"Eu": 2},
            "criterion": {"core": 1.12},
            "override": [{"paths": ["zintl/*"], "anions": ["Ga", "Ge"], "valence": {"Yb": 2}, "criterion": {"maximum": 1.25}}],
        },
        root=tmp_path,
    )
    plain = cfg.options_for("oxides/x.cif")
    assert isinstance(plain, Options)
    assert plain.anions == ["Sb"] and plain.valence == {"Eu": 2}
    assert plain.criterion == Criterion(core=1.12)
    z = cfg.options_for("zintl/sample.cif")
    assert z.anions == ["Ga", "Ge"] and z.valence == {"Eu": 2, "Yb": 2}
    assert (z.criterion.core, z.criterion.maximum, z.criterion.relative) == (1.12, 1.25, Criterion().relative)
    assert z.key() != plain.key()


def test_settings_change_the_count(tmp_path, minerals):
    """A per-file valence override reaches the check: cristobalite (COD
    9017338) closes with Si at 4 valence electrons; counted with 3 (as if the
    site held a group-13 atom) it lacks (3 + 2 x 6)/2 - 8 = -0.5 electrons per O."""
    from bondcheck.gate import run

    d = tmp_path / "s"
    d.mkdir()
    shutil.copy(minerals / "cod_9017338.cif", d / "cristobalite.cif")
    plain = run(parse({}, root=tmp_path), [d / "cristobalite.cif"])
    r = plain.checked[0].result
    assert (r.verdict, r.anions, r.vec_anion) == ("consistent", ["O"], 8.0)
    assert plain.exit_code == 0
    cfg = parse({"override": [{"paths": ["s/*"], "valence": {"Si": 3}}]}, root=tmp_path)
    forced = run(cfg, [d / "cristobalite.cif"])
    r = forced.checked[0].result
    assert r.verdict == "mismatch" and r.vec_anion == pytest.approx(7.5) and r.residual == pytest.approx(-0.5)
    assert forced.exit_code == 1 and [i.slug for i in forced.checked[0].items if i.failing]


@pytest.mark.parametrize(
    "toml, key",
    [
        ('fail_on = "error"', "fail_on: unknown key (did you mean 'fail-on'?)"),
        ('fail-on = "warn"', "fail-on: expected one of info, warning, error, never"),
        ('unreadable = "skip"', "unreadable: expected one of fail, finding"),
        ('paths = ["nowhere"]', "paths: 'nowhere' does not exist"),
        ("paths = 3", "paths: expected a list of strings"),
        ('anions = ["Xx"]', "anions: unknown element 'Xx'"),
        ("valence = { Eu = true }", "valence.Eu: expected a whole number"),
        ("valence = { Eu = 2.5 }", "valence.Eu: expected a whole number"),
        ("[criterion]\ncore = 1.4\nmaximum = 1.3", "criterion.core: core (1.4) exceeds maximum (1.3)"),
        ("[criterion]\ncutoff = 1.4", "criterion.cutoff: unknown key"),
        ("[[override]]\nanions = [\"Sb\"]", "override[1].paths: missing"),
        ('[[accept]]\npaths = ["a.cif"]', "accept[1].reason: missing: every acceptance needs a reason"),
        ('[[accept]]\npaths = ["a.cif"]\nreason = "  "', "accept[1].reason: empty"),
        ('[[accept]]\nfindings = ["electron-excesss"]\nreason = "r"', "did you mean 'electron-excess'?"),
        ('[[accept]]\nreason = "metals"', "accept[1]: needs paths, findings or both"),
        ("fail-on = ", "invalid TOML"),
    ],
)
def test_config_errors_name_the_key(tmp_path, toml, key):
    (tmp_path / "bondcheck.toml").write_text(toml + "\n")
    with pytest.raises(ConfigError) as exc:
        load(tmp_path / "bondcheck.toml")
    assert key in str(exc.value)
    assert str(tmp_path / "bondcheck.toml") in str(exc.value)


def test_config_error_exits_2(tmp_path, monkeypatch, capsys):
    (tmp_path / "pyproject.toml").write_text('[tool.bondcheck]\nfail-on = "sometimes"\n')
    assert bondcheck(monkeypatch, tmp_path, "gate") == 2
    err = capsys.readouterr().err
    assert "[tool.bondcheck]: fail-on" in err


# --------------------------------------------------------------------------
# reports


def test_sarif_points_at_the_site_rows(tmp_path, repo_files, monkeypatch, capsys):
    """With fail-on info, the lone pairs of TlBiSe2 (pymatgen's bundled
    structure; Tl+ and Bi3+ keep 6s2 pairs, common practice, no source) are
    reported with their sites; each SARIF result points at the line of its
    first site's row in the atom-site loop."""
    d = tmp_path / "r"
    (d / "structures").mkdir(parents=True)
    (d / "structures" / "tlbise2.cif").write_bytes(repo_files["structures/tlbise2.cif"])
    (d / "bondcheck.toml").write_text('paths = ["structures"]\nfail-on = "info"\n')
    assert bondcheck(monkeypatch, d, "gate", "--format", "sarif") == 1
    doc = json.loads(capsys.readouterr().out)
    assert not list(sarif_validator().iter_errors(doc))
    lines = (d / "structures" / "tlbise2.cif").read_text().splitlines()
    with_sites = [r for r in doc["runs"][0]["results"] if r["properties"]["sites"]]
    assert with_sites, "expected findings with sites (lone pairs on Tl and Bi)"
    for r in with_sites:
        row = lines[r["locations"][0]["physicalLocation"]["region"]["startLine"] - 1]
        assert any(s in row.split() for s in r["properties"]["sites"]), row


def test_schema_rejects_broken_sarif(repo_files, tmp_path, monkeypatch, capsys):
    """The vendored schema bites: a wrong level or a missing version fails."""
    (tmp_path / "x.cif").write_bytes(repo_files["structures/metals/lead.cif"])
    assert bondcheck(monkeypatch, tmp_path, "gate", "x.cif", "--format", "sarif") == 1
    doc = json.loads(capsys.readouterr().out)
    v = sarif_validator()
    assert not list(v.iter_errors(doc))
    doc["runs"][0]["results"][0]["level"] = "warn"
    assert list(v.iter_errors(doc))
    del doc["version"]
    assert len(list(v.iter_errors(doc))) >= 2


def test_rules_cover_every_finding():
    from bondcheck.findings import all_findings
    from bondcheck.render.sarif import rules

    rs = {r["id"]: r for r in rules()}
    for slug, cls in all_findings().items():
        assert rs[slug]["shortDescription"]["text"] == cls.title
        assert cls.meaning in rs[slug]["help"]["text"] and cls.next_steps in rs[slug]["help"]["text"]
    assert rs["unreadable-input"]["defaultConfiguration"]["level"] == "error"


def test_precommit_hook_declared():
    import yaml

    root = Path(__file__).resolve().parents[1]
    hooks = yaml.safe_load((root / ".pre-commit-hooks.yaml").read_text())
    (hook,) = [h for h in hooks if h["id"] == "bondcheck"]
    assert hook["entry"].split()[:2] == ["bondcheck", "gate"]
    import re

    assert re.search(hook["files"], "structures/HL-0042.cif") and not re.search(hook["files"], "README.md")
