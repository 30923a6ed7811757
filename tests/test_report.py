"""The HTML report: data behind the figures, results files, and the page as a
browser shows it (headless Chromium over the DevTools protocol on a pipe).

Inputs are real structures: ase's bundled COD mineral CIFs
(ase/test/testdata/minerals), pymatgen's bundled structures
(pymatgen/util/structures) and elemental crystals of ase.collections.dcdft.
"""
from __future__ import annotations

import base64
import csv
import io
import json
import math
import os
import queue
import shutil
import subprocess
import threading
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from bondcheck.read import read

from .conftest import MINERALS, PMG_STRUCTURES



class _Proc:
    def __init__(self, returncode: int, stdout: str, stderr: str):
        self.returncode, self.stdout, self.stderr = returncode, stdout, stderr


def _run(*args, check_rc=None) -> _Proc:
    """`bondcheck ARGS...` in this process (the command line's own entry point)."""
    from contextlib import redirect_stderr, redirect_stdout

    from bondcheck.cli import main

    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        try:
            rc = main([str(a) for a in args])
        except SystemExit as exc:  # argparse errors
            rc = exc.code if isinstance(exc.code, int) else 2
    proc = _Proc(rc, out.getvalue(), err.getvalue())
    if check_rc is not None:
        assert proc.returncode == check_rc, proc.stderr
    return proc


# --------------------------------------------------------------------------
# Inputs shared by the tests


# ase.collections.dcdft: fcc Pb and simple-cubic Po are metals that the 8-N
# rule does not describe (mismatch); fcc Cu has nothing to count.
DCDFT = ("Pb", "Po", "Cu")
PMG = ("CsCl.json", "K2O2.json", "Graphite.json", "TlBiSe2.json", "Si.json")
CAPPED = 4  # sections in the report capped by --max-sections
SUMMARY_PLOTS = 6  # figures on a few entries (each costs about half a second), drawn by 2 workers


@pytest.fixture(scope="module")
def inputs(tmp_path_factory) -> list[Path]:
    from ase.collections import dcdft
    from ase.io import write

    d = tmp_path_factory.mktemp("inputs")
    paths = sorted(MINERALS.glob("*.cif"))
    paths += [PMG_STRUCTURES / n for n in PMG]
    for el in DCDFT:
        p = d / f"dcdft-{el}.extxyz"
        write(p, dcdft[el])
        paths.append(p)
    return paths


@pytest.fixture(scope="module")
def json_rows(inputs) -> list[dict]:
    """The numbers of record: `bondcheck check --format json` on the inputs."""
    proc = _run("check", "--format", "json", *inputs)
    assert proc.returncode in (0, 1), proc.stderr
    rows = json.loads(proc.stdout)
    assert len(rows) == len(inputs)
    return rows


@pytest.fixture(scope="module")
def reports(inputs, json_rows, tmp_path_factory) -> dict[str, Path]:
    d = tmp_path_factory.mktemp("reports")
    out = {}
    out["structures"] = d / "structures.html"
    _run("report", *inputs, "-o", out["structures"], "--max-plots", str(SUMMARY_PLOTS), "--jobs", "2", check_rc=0)
    out["single"] = d / "single.html"
    _run("report", MINERALS / "cod_9017338.cif", "-o", out["single"], check_rc=0)
    jl = d / "scan.jsonl"
    jl.write_text("".join(json.dumps(r) + "\n" for r in json_rows))
    out["jsonl"] = d / "scan.html"
    _run("report", jl, "-o", out["jsonl"], check_rc=0)
    out["capped"] = d / "capped.html"
    _run("report", jl, "-o", out["capped"], "--plots", "none", "--max-sections", str(CAPPED), check_rc=0)
    return out


# --------------------------------------------------------------------------
# The detail behind the figures


def _detail(path: Path):
    from bondcheck.render.plots import collect

    (crystal,) = read(path)
    return collect(crystal)


def test_contacts_of_cscl_cs_site():
    """CsCl type: 8 Cl at a*sqrt(3)/2 around Cs, the 6 Cs at a never bonded
    (two electropositive atoms). Structure: pymatgen's bundled CsCl.json;
    geometry of the CsCl type is common practice, no source."""
    det = _detail(PMG_STRUCTURES / "CsCl.json")
    a = float(np.linalg.norm(det.cell[0]))
    cs = next(s for s in det.site_contacts if s.element == "Cs")
    cl_bonds = [c for c in cs.contacts if c.element == "Cl"]
    assert sum(c.n for c in cl_bonds) == 8
    assert all(c.bonded and c.kind == "cation-anion" for c in cl_bonds)
    assert cl_bonds[0].d == pytest.approx(a * math.sqrt(3) / 2, rel=1e-4)
    cs_cs = [c for c in cs.contacts if c.element == "Cs"]
    assert sum(c.n for c in cs_cs) == 6, "both directions of a contact to the atom's own image"
    assert all(c.kind == "electropositive" and not c.bonded for c in cs_cs)
    assert cs_cs[0].d == pytest.approx(a, rel=1e-4)


def test_diamond_silicon_substructure():
    """Diamond Si (pymatgen's Si.json): each atom 4 bonds at a*sqrt(3)/4 on the
    conventional cubic axes (common practice, no source); with one element,
    every atom is an anion, so all bonds are anion-anion."""
    det = _detail(PMG_STRUCTURES / "Si.json")
    (si,) = det.site_contacts
    first = [c for c in si.contacts if c.bonded]
    assert sum(c.n for c in first) == 4 and all(c.kind == "anion-anion" for c in first)
    # bonds per cell: 4 per atom, each shared by two atoms
    assert len(det.aa_bonds) == 2 * len(det.symbols)
    vol_per_atom = abs(np.linalg.det(det.cell)) / len(det.symbols)
    a = (8 * vol_per_atom) ** (1 / 3)
    assert first[0].d == pytest.approx(a * math.sqrt(3) / 4, rel=1e-3)


def test_peroxide_dumbbells_drawn():
    """K2O2 (pymatgen's K2O2.json): O2^2- dumbbells, one O-O bond per two O
    (common practice, no source); K-K contacts are never bonds."""
    det = _detail(PMG_STRUCTURES / "K2O2.json")
    n_o = sum(1 for s in det.symbols if s == "O")
    assert len(det.aa_bonds) == n_o // 2
    for i, j, _ in det.aa_bonds:
        assert det.symbols[i] == det.symbols[j] == "O"
    o = next(s for s in det.site_contacts if s.element == "O")
    assert sum(c.n for c in o.contacts if c.kind == "anion-anion" and c.bonded) == 1


def test_graphite_takes_one_pi_electron_per_carbon():
    """Graphite (pymatgen's Graphite.json): three sigma bonds per C and one
    electron per C in the pi system (common practice, no source)."""
    det = _detail(PMG_STRUCTURES / "Graphite.json")
    assert det.closes is True
    assert det.kept == []
    assert det.pi_per_formula == pytest.approx(1.0)


def test_lone_pairs_of_tl_and_bi_in_tlbise2():
    """TlBiSe2 (pymatgen's bundled structure): Tl+ and Bi3+ with Se2- keep an
    ns2 lone pair each (inert pair; common practice, no source)."""
    det = _detail(PMG_STRUCTURES / "TlBiSe2.json")
    kept = {k.element: k for k in det.kept}
    assert set(kept) == {"Tl", "Bi"}
    assert kept["Tl"].per_atom == pytest.approx(2) and kept["Bi"].per_atom == pytest.approx(2)
    assert kept["Tl"].what == "a lone pair"


@pytest.mark.parametrize("path", sorted(MINERALS.glob("*.cif")) + [PMG_STRUCTURES / n for n in PMG], ids=lambda p: p.name)
def test_closure_balances_the_residual(path):
    """Written-out closure: kept electrons minus pi electrons equal
    (residual + CC) x anions per formula, within the count tolerance."""
    det = _detail(path)
    r = det.result
    if not det.closes:
        pytest.skip(f"{path.name}: the count does not close")
    kept = sum(k.per_formula for k in det.kept)
    rhs = (r.residual + r.cc_observed) * r.anions_per_formula
    assert kept - det.pi_per_formula == pytest.approx(rhs, abs=0.05 * r.anions_per_formula + 0.01)


# --------------------------------------------------------------------------
# Results files


def test_results_files_read_alike(json_rows, tmp_path):
    """A JSON array (`check --format json`), and JSON Lines, CSV and Parquet as
    the scan writes them, give the same rows."""
    from bondcheck.commands.report import is_results_file, read_results
    from bondcheck.scan import open_writer

    arr = tmp_path / "check.json"
    arr.write_text(json.dumps(json_rows))
    written = [arr]
    for suffix in (".jsonl", ".csv", ".parquet"):
        f = tmp_path / f"scan{suffix}"
        w = open_writer(str(f))
        for r in json_rows:
            w.write(dict(r))
        w.close()
        written.append(f)

    assert not is_results_file(PMG_STRUCTURES / "CsCl.json"), "a pymatgen structure JSON is a structure"
    assert not is_results_file(MINERALS / "cod_1010930.cif")
    for f in written:
        assert is_results_file(f)
        rows = read_results(f)
        assert [r["path"] for r in rows] == [r["path"] for r in json_rows], f.name
        for got, want in zip(rows, json_rows):
            assert got["verdict"] == want["verdict"]
            assert got["causes"] == want["causes"]
            assert [(x["slug"], x["message"], x["evidence"]) for x in got["findings"]] == [
                (x["slug"], x["message"], x["evidence"]) for x in want["findings"]
            ], f.name
            assert got["sites"] == want["sites"]
            for k in ("vec_anion", "aa_observed", "residual"):
                assert (got[k] is None) == (want[k] is None)
                if want[k] is not None:
                    assert float(got[k]) == pytest.approx(want[k])


def test_report_from_a_scan_store(tmp_path):
    """`bondcheck report` reads a scan's results store (SQLite) directly."""
    store = tmp_path / "store.sqlite"
    _run("scan", MINERALS, "--store", store, "--jobs", "1", "--no-progress", check_rc=0)
    out = tmp_path / "store.html"
    _run("report", store, "-o", out, check_rc=0)
    page = out.read_text()
    p = _Refs()
    p.feed(page)
    assert len(p.sections) == len(list(MINERALS.glob("*.cif")))
    assert "CoAsS" in page and "cod_9017338" in page


def test_report_input_errors(tmp_path):
    bad = tmp_path / "broken.jsonl"
    bad.write_text('{"path": "x"}\nnot json\n')
    proc = _run("report", bad, "-o", tmp_path / "r.html")
    assert proc.returncode == 2 and "line 2" in proc.stderr
    proc = _run("report", tmp_path / "absent.cif", MINERALS / "cod_1010995.cif", "--plots", "none", "-o", tmp_path / "r.html")
    assert proc.returncode == 2
    page = (tmp_path / "r.html").read_text()
    assert "no such file or directory" in page and "SiC" in page


# --------------------------------------------------------------------------
# The page as text


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs: list[tuple[str, str, str]] = []
        self.ids: list[str] = []
        self.sections: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        for k, v in attrs:
            if k in ("src", "href", "xlink:href", "action", "formaction", "poster", "data", "srcset", "background"):
                self.refs.append((tag, k, v or ""))
        if "id" in a:
            self.ids.append(a["id"])
        if tag == "section" and "structure" in (a.get("class") or ""):
            self.sections.append(a["id"])


def test_page_is_self_contained(reports, json_rows):
    import re

    for name, path in reports.items():
        page = path.read_text()
        p = _Refs()
        p.feed(page)
        outside = [r for r in p.refs if not r[2].startswith("#")]
        assert not outside, f"{name}: references outside the page: {outside[:5]}"
        assert not re.search(r"https?://", page), f"{name}: a URL in the page"
        assert not re.search(r"url\((?!#)", page), f"{name}: a CSS url() to a file"
        assert "@media print" in page
        assert len(p.ids) == len(set(p.ids)), f"{name}: duplicate ids"
        # every in-page link has a target
        targets = set(p.ids)
        dangling = {r[2][1:] for r in p.refs if r[2].startswith("#") and r[2] != "#"} - targets
        assert not dangling, f"{name}: links without a target: {sorted(dangling)[:5]}"
    p = _Refs()
    p.feed(reports["structures"].read_text())
    assert len(p.sections) == len(json_rows)


def test_sections_capped_flagged_first(reports, json_rows):
    """--max-sections keeps sections for errors, then mismatches, then entries
    with nothing to count, then consistent ones; every row stays in the table."""
    import re

    page = reports["capped"].read_text()
    p = _Refs()
    p.feed(page)
    rank = {None: 0, "mismatch": 1, "not-applicable": 2, "consistent": 3}
    want = sorted(range(len(json_rows)), key=lambda n: (rank[json_rows[n]["verdict"]], n))[:CAPPED]
    assert p.sections == [f"e{n + 1}" for n in sorted(want)]
    assert len(re.findall(r'<tr class="v-[a-z-]+" data-verdict=', page)) == len(json_rows)
    assert f"{len(json_rows) - CAPPED} of {len(json_rows)} entries are rows of the table" in page


# --------------------------------------------------------------------------
# In a browser


def _chromium() -> str | None:
    """Debian's chromium; BONDCHECK_CHROMIUM names another binary (or, set
    to a path that does not exist, turns the browser checks off)."""
    if "BONDCHECK_CHROMIUM" in os.environ:
        c = os.environ["BONDCHECK_CHROMIUM"]
        return c if os.path.exists(c) else None
    for c in ("/usr/bin/chromium", shutil.which("chromium"), shutil.which("chromium-browser")):
        if c and os.path.exists(c):
            return c
    return None


class Browser:
    """Headless Chromium driven over the DevTools protocol on a pipe
    (--remote-debugging-pipe: JSON messages separated by NUL bytes on file
    descriptors 3 and 4), so no port and no websocket client are needed."""

    FLAGS = (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        "--disable-extensions",
        "--mute-audio",
        "--hide-scrollbars",
        "--remote-debugging-pipe",
    )

    def __init__(self, exe: str, profile: Path):
        import fcntl

        r_in, w_in = os.pipe()
        r_out, w_out = os.pipe()
        # Move the child's ends out of the way of 3 and 4 before dup2 in the child.
        hi_r = fcntl.fcntl(r_in, fcntl.F_DUPFD_CLOEXEC, 10)
        hi_w = fcntl.fcntl(w_out, fcntl.F_DUPFD_CLOEXEC, 10)
        os.close(r_in)
        os.close(w_out)

        def child():
            os.dup2(hi_r, 3)
            os.dup2(hi_w, 4)

        self.proc = subprocess.Popen(
            [exe, *self.FLAGS, f"--user-data-dir={profile}", "about:blank"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            preexec_fn=child,
            pass_fds=(3, 4),
        )
        os.close(hi_r)
        os.close(hi_w)
        self.w = os.fdopen(w_in, "wb", buffering=0)
        self.r = os.fdopen(r_out, "rb", buffering=0)
        self.q: queue.Queue = queue.Queue()
        self.events: list[dict] = []
        self.next_id = 0
        self.session = None
        self.stderr = b""
        threading.Thread(target=self._reader, daemon=True).start()
        threading.Thread(target=self._drain_stderr, daemon=True).start()

    def _drain_stderr(self):
        for line in self.proc.stderr:
            self.stderr += line

    def _reader(self):
        buf = b""
        while True:
            chunk = self.r.read(65536)
            if not chunk:
                self.q.put(None)
                return
            buf += chunk
            while b"\0" in buf:
                msg, buf = buf.split(b"\0", 1)
                self.q.put(json.loads(msg))

    def _next(self, timeout: float):
        msg = self.q.get(timeout=timeout)
        if msg is None:
            raise RuntimeError("chromium closed the pipe: " + self.stderr.decode(errors="replace")[-2000:])
        if "method" in msg:
            self.events.append(msg)
        return msg

    def send(self, method: str, params: dict | None = None, session: bool = True, timeout: float = 60.0) -> dict:
        self.next_id += 1
        mid = self.next_id
        msg = {"id": mid, "method": method, "params": params or {}}
        if session and self.session:
            msg["sessionId"] = self.session
        self.w.write(json.dumps(msg).encode() + b"\0")
        while True:
            m = self._next(timeout)
            if m.get("id") == mid:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})

    def wait_event(self, method: str, timeout: float = 60.0) -> dict:
        for e in self.events:
            if e["method"] == method and not e.get("_seen"):
                e["_seen"] = True
                return e
        while True:
            m = self._next(timeout)
            if m.get("method") == method:
                m["_seen"] = True
                return m

    def open(self) -> None:
        targets = self.send("Target.getTargets", session=False)["targetInfos"]
        page = next(t for t in targets if t["type"] == "page")
        self.session = self.send("Target.attachToTarget", {"targetId": page["targetId"], "flatten": True}, session=False)["sessionId"]
        for domain in ("Runtime", "Log", "Network", "Page"):
            self.send(f"{domain}.enable")
        self.send("Emulation.setDeviceMetricsOverride", {"width": 1280, "height": 900, "deviceScaleFactor": 1, "mobile": False})

    def load(self, url: str) -> None:
        self.events.clear()
        self.send("Page.navigate", {"url": url})
        self.wait_event("Page.loadEventFired")

    def js(self, expression: str):
        res = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in res:
            raise RuntimeError(f"page script failed: {res['exceptionDetails']}")
        return res["result"].get("value")

    def problems(self) -> list[str]:
        out = []
        for e in self.events:
            m, p = e["method"], e.get("params", {})
            if m == "Runtime.exceptionThrown":
                out.append("exception: " + json.dumps(p.get("exceptionDetails", {}))[:300])
            elif m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "warning", "assert"):
                out.append(f"console {p['type']}: " + json.dumps(p.get("args"))[:300])
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") in ("error", "warning"):
                out.append("log: " + p["entry"].get("text", "")[:300])
        return out

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events if e["method"] == "Network.requestWillBeSent"]

    def close(self) -> None:
        try:
            self.send("Browser.close", session=False, timeout=10)
        except Exception:
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium is not installed (Debian package 'chromium'; .ci/run installs it): browser checks skipped")
    b = Browser(exe, tmp_path_factory.mktemp("chromium-profile"))
    try:
        b.open()
    except Exception:
        b.close()
        raise
    yield b
    b.close()


def _load_clean(browser, path: Path, query: str = "") -> None:
    url = path.resolve().as_uri() + query
    browser.load(url)
    assert browser.problems() == []
    reqs = browser.requests()
    assert reqs and all(u.split("?")[0] == path.resolve().as_uri() for u in reqs), f"requests beyond the page itself: {reqs}"


def _not_blank(browser, out: Path) -> None:
    from PIL import Image

    png = base64.b64decode(browser.send("Page.captureScreenshot", {"format": "png"})["data"])
    out.write_bytes(png)
    img = np.asarray(Image.open(io.BytesIO(png)).convert("RGB")).astype(int)
    assert img.shape[0] >= 800 and img.shape[1] >= 1200
    inked = np.mean(np.min(img, axis=2) < 200)
    colours = len(np.unique(img.reshape(-1, 3) // 16, axis=0))
    assert inked > 0.02, f"screenshot nearly blank ({inked:.3%} inked)"
    assert colours > 10


def test_summary_page_in_browser(browser, reports, json_rows, tmp_path):
    page = reports["structures"]
    _load_clean(browser, page)
    _not_blank(browser, tmp_path / "summary.png")

    # Every structure section, in input order, with its file path.
    paths = browser.js("Array.from(document.querySelectorAll('section.structure .path')).map(p => p.textContent)")
    assert paths == [r["path"] for r in json_rows]
    n_fig = browser.js("document.querySelectorAll('section.structure figure.contacts svg').length")
    assert n_fig == SUMMARY_PLOTS
    notes = browser.js("document.querySelectorAll('section.structure .note').length")
    assert notes == len(json_rows) - SUMMARY_PLOTS

    # Filter by verdict, then by text.
    total = len(json_rows)
    assert browser.js("document.getElementById('filter-count').textContent") == f"{total} of {total} entries shown"
    visible = "Array.from(document.querySelectorAll('#entries tbody tr')).filter(r => !r.hidden)"
    verdicts = {r["verdict"] or "error" for r in json_rows}
    assert len(verdicts) >= 2
    for v in sorted(verdicts):
        browser.js(f"(() => {{ const s = document.getElementById('filter-verdict'); s.value = '{v}'; s.dispatchEvent(new Event('change')); }})()")
        shown = browser.js(f"{visible}.map(r => document.querySelector(r.querySelector('a').getAttribute('href')).querySelector('.path').textContent)")
        assert shown == [r["path"] for r in json_rows if (r["verdict"] or "error") == v], v
    browser.js("(() => { const s = document.getElementById('filter-verdict'); s.value = ''; s.dispatchEvent(new Event('change')); })()")
    browser.js("(() => { const t = document.getElementById('filter-text'); t.value = 'CoAsS'; t.dispatchEvent(new Event('input')); })()")
    assert browser.js(f"{visible}.length") == sum(r["formula"] == "CoAsS" for r in json_rows) == 2
    browser.js("(() => { const t = document.getElementById('filter-text'); t.value = ''; t.dispatchEvent(new Event('input')); })()")
    assert browser.js(f"{visible}.length") == total

    # Sort by VEC per anion: ascending, entries without a value last.
    browser.js("document.querySelectorAll('#entries th button')[6].click()")
    col = browser.js(f"{visible}.map(r => r.cells[6].getAttribute('data-sort'))")
    nums = [float(x) for x in col if x]
    assert nums == sorted(nums) and all(col[: len(nums)]) and not any(col[len(nums) :])
    assert nums == sorted(float(r["vec_anion"]) for r in json_rows if r["vec_anion"] is not None)

    # The scatter's drawn points, mapped back through the axes, are the JSON numbers.
    pts = browser.js(
        """(() => {
          const fig = document.getElementById('scatter');
          const box = JSON.parse(fig.getAttribute('data-axes'));
          const out = [];
          fig.querySelectorAll('svg g[id^="scatter-pts-"]').forEach(g => {
            g.querySelectorAll('a').forEach(a => {
              // matplotlib writes a marker as <use> or, for few points, as a <path>;
              // the centre of its box is the data point (the markers are symmetric).
              const m = a.querySelector('use, path');
              if (!m) throw new Error('no marker in ' + a.outerHTML.slice(0, 300));
              const bb = m.getBBox();
              const sec = document.querySelector(a.getAttribute('href'));
              out.push({verdict: g.id.replace('scatter-pts-', ''), path: sec.querySelector('.path').textContent,
                        x: bb.x + bb.width / 2, y: bb.y + bb.height / 2});
            });
          });
          return {box: box, pts: out};
        })()"""
    )
    box = pts["box"]

    def data(x, y):
        (x0, x1), (y0, y1) = box["xlim"], box["ylim"]
        vx = x0 + (x - box["x0"]) / (box["x1"] - box["x0"]) * (x1 - x0)
        vy = y0 + (box["y1"] - y) / (box["y1"] - box["y0"]) * (y1 - y0)
        return vx, vy

    by_path = {r["path"]: r for r in json_rows}
    placed = [r for r in json_rows if r["vec_anion"] is not None and r["aa_observed"] is not None]
    assert len(pts["pts"]) == len(placed) >= 10
    for p in pts["pts"]:
        r = by_path[p["path"]]
        vx, vy = data(p["x"], p["y"])
        assert vx == pytest.approx(r["vec_anion"], abs=2e-3), p["path"]
        assert vy == pytest.approx(r["aa_observed"], abs=2e-3), p["path"]
        assert p["verdict"] == r["verdict"]
    island = json.loads(browser.js("document.getElementById('bondcheck-points').textContent"))
    assert sorted((q["vec_anion"], q["aa_observed"]) for q in island) == sorted((r["vec_anion"], r["aa_observed"]) for r in placed)

    # Printing: controls hidden, each structure on a new page, a PDF comes out.
    browser.send("Emulation.setEmulatedMedia", {"media": "print"})
    try:
        assert browser.js("getComputedStyle(document.querySelector('.filters')).display") == "none"
        assert browser.js("getComputedStyle(document.querySelector('section.structure')).breakBefore") == "page"
    finally:
        browser.send("Emulation.setEmulatedMedia", {"media": ""})
    pdf = base64.b64decode(browser.send("Page.printToPDF", {"printBackground": False})["data"])
    assert pdf.startswith(b"%PDF") and pdf.count(b"/Type /Page") - pdf.count(b"/Type /Pages") >= len(json_rows)
    assert browser.problems() == []


def test_filter_from_the_address(browser, reports, json_rows):
    _load_clean(browser, reports["jsonl"], "?verdict=not-applicable")
    n = sum(r["verdict"] == "not-applicable" for r in json_rows)
    assert n >= 1
    assert browser.js("document.getElementById('filter-count').textContent") == f"{n} of {len(json_rows)} entries shown"
    # From results rows: figures only for the flagged entries whose file is at hand.
    figs = browser.js("Array.from(document.querySelectorAll('section.structure')).filter(s => s.querySelector('figure.contacts')).map(s => s.querySelector('.path').textContent)")
    assert sorted(figs) == sorted(r["path"] for r in json_rows if r["verdict"] in ("mismatch", "not-applicable"))


def test_single_structure_page(browser, reports, tmp_path):
    """Cristobalite (COD 9017338, ase's minerals): Si bonded to 4 O, O to 2 Si,
    no O-O bonds (common practice, no source)."""
    _load_clean(browser, reports["single"])
    _not_blank(browser, tmp_path / "single.png")
    assert browser.js("document.querySelectorAll('section.structure').length") == 1
    assert browser.js("document.getElementById('entries')") is None
    text = browser.js("document.querySelector('.banner').textContent")
    assert "Consistent" in text
    # Contact plot: O has 2 filled cation-anion markers summing to 2 Si, Si 4 O.
    labels = browser.js("Array.from(document.querySelectorAll('figure.contacts svg text')).map(t => t.textContent)")
    assert any(t.startswith("Si") for t in labels) and any(t.startswith("O") for t in labels)
    assert browser.js("document.querySelectorAll('figure.contacts g[id$=\"contacts-cation-anion-bonded\"] use').length") >= 2


def test_substructure_viewer_turns(browser, reports):
    """The 3D view of cristobalite (COD 9017338: SiO2, Z = 4, 12 atoms in the
    cell; common practice, no source): all atoms drawn, no anion-anion bonds
    (every O bonds to Si only), and the arrow keys turn it."""
    _load_clean(browser, reports["single"])
    model = json.loads(browser.js("document.querySelector('details.viewer .viewer-box').getAttribute('data-model')"))
    (crystal,) = read(MINERALS / "cod_9017338.cif")
    assert len(model["atoms"]) == crystal.natoms == 12
    assert sum(a[4] for a in model["atoms"]) == 8  # the O atoms are the anions
    assert model["bonds"] == []
    assert browser.js("document.querySelector('details.viewer svg')") is None, "drawn only when opened"
    browser.js("document.querySelector('details.viewer').open = true")
    n = browser.js("new Promise(r => setTimeout(() => r(document.querySelectorAll('details.viewer svg circle').length), 50))")
    assert n == len(model["atoms"]) + len(model["ghosts"])
    k = browser.js("document.querySelector('details.viewer svg circle.anion').getAttribute('data-i')")
    first = f"document.querySelector('details.viewer svg circle[data-i=\"{k}\"]').getAttribute('cx')"
    before = float(browser.js(first))
    browser.js(
        "(() => { const s = document.querySelector('details.viewer svg'); s.focus();"
        " for (let i = 0; i < 5; i++) s.dispatchEvent(new KeyboardEvent('keydown', {key: 'ArrowRight', bubbles: true})); })()"
    )
    assert float(browser.js(first)) != pytest.approx(before, abs=1e-3)
    browser.js("document.querySelector('details.viewer button[data-view=\"c\"]').click()")
    assert float(browser.js(first)) == pytest.approx(before, abs=1e-3), "'down c' restores the first view"
    assert browser.problems() == []


def test_text_from_files_is_escaped(json_rows):
    """Names, formulas and messages come from files: whatever they hold, the
    page keeps exactly its own elements (the rows are real rows of the JSON
    output with their text fields replaced)."""
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from bondcheck.render.html import Entry, render

    base = [r for r in json_rows if r["status"] == "ok"][:2]

    class Tags(HTMLParser):
        def __init__(self):
            super().__init__()
            self.scripts = 0
            self.sections = 0

        def handle_starttag(self, tag, attrs):
            self.scripts += tag == "script"
            self.sections += tag == "section"

    pieces = st.sampled_from(list("<>&\"'/ =ab\u00e9\u2212") + ["<script>", "</section>", "<!--", "]]>", "</script>"])
    text = st.lists(pieces, max_size=12).map("".join)

    @settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
    @given(name=text, formula=text, message=text, label=text)
    def check(name, formula, message, label):
        rows = []
        for r in base:
            r = json.loads(json.dumps(r))
            r["name"], r["formula"] = name, formula
            for f in r["findings"]:
                f["message"] = message
                f["sites"] = [label]
            for s in r["sites"]:
                s["label"] = label
            rows.append(r)
        page = render([Entry(r) for r in rows])
        t = Tags()
        t.feed(page)
        assert t.scripts == 2  # the data island and the page's script
        assert t.sections == 1 + len(rows)  # the summary and one per entry

    check()


def test_rows_with_missing_or_odd_fields(json_rows):
    """Rows from other tools may lack keys or carry a status such as 'timeout'."""
    from bondcheck.commands.report import normalise_row
    from bondcheck.render.html import Entry, render

    real = next(r for r in json_rows if r["verdict"] == "mismatch")
    rows = [
        normalise_row({"path": real["path"], "status": "timeout", "error": "gave up after 5 s"}),
        normalise_row({k: v for k, v in real.items() if k not in ("sites", "findings", "partition", "formula")}),
        normalise_row({**real, "causes": "electron-excess;some-future-finding", "vec_anion": "6.0", "residual": ""}),
    ]
    page = render([Entry(r) for r in rows])
    assert "gave up after 5 s" in page and "Not checked" in page
    assert rows[2]["causes"] == ["electron-excess", "some-future-finding"]
    assert rows[2]["vec_anion"] == 6.0 and rows[2]["residual"] is None
    assert "some-future-finding" in page
