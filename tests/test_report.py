"""The run report (ceiling/report/): one self-contained HTML file, checked statically and in a
real browser.

Static checks parse the HTML with Python's ``html.parser`` and compare the summary tables with
``summary.csv`` read by the ``csv`` module (the source the report must match). The browser
check opens the report in headless Chromium (Debian's ``chromium`` package) driven over the
Chrome DevTools Protocol on a pipe (``--remote-debugging-pipe``: JSON messages separated by NUL
bytes on file descriptors 3 and 4; Source: the DevTools protocol documentation,
https://chromedevtools.github.io/devtools-protocol/): it records console messages, exceptions,
log entries and every network request while the page loads, then reads image sizes and table
cells from the live DOM and takes a screenshot. The test is skipped only when chromium is not
installed (CI installs it).
"""

from __future__ import annotations

import base64
import csv
import fcntl
import hashlib
import io
import json
import os
import queue
import re
import shutil
import subprocess
import tempfile
import threading
import time
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from projection_helpers import cli, demo_run

from ceiling import maps
from ceiling.report import CAUTIONS, REPORT_FILE, build_report

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync"]
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    out, _ = demo_run(tmp_path_factory)
    return out


@pytest.fixture(scope="module")
def html(run) -> str:
    return (run / REPORT_FILE).read_text(encoding="utf-8")


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def read_rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


# --- parsing the report ------------------------------------------------------------------------------------------

class Structure(HTMLParser):
    """Checks that every opened non-void element is closed, in order; collects tables and images."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.images: list[dict[str, str]] = []
        self.tables: dict[str, list[tuple[dict[str, str], dict[str, str]]]] = {}
        self._table: str | None = None
        self._row: tuple[dict[str, str], dict[str, str]] | None = None
        self._cell: str | None = None
        self._text: list[str] = []
        self.section_text: dict[str, list[str]] = {}
        self._section: str | None = None

    def handle_starttag(self, tag, attrs):
        a = {k: v or "" for k, v in attrs}
        if tag == "img":
            self.images.append(a)
        if tag == "section":
            self._section = a.get("id")
        if tag == "table":
            self._table = a.get("id", "")
            self.tables.setdefault(self._table, [])
        if tag == "tr" and self._table is not None:
            self._row = ({k[5:]: v for k, v in a.items() if k.startswith("data-")}, {})
        if tag == "td" and self._row is not None:
            self._cell, self._text = a.get("data-col", ""), []
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in VOID:
            self.stack.pop()

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else 'nothing'}> at line {self.getpos()[0]}")
            if tag in self.stack:
                while self.stack and self.stack.pop() != tag:
                    pass
            return
        self.stack.pop()
        if tag == "td" and self._row is not None and self._cell is not None:
            self._row[1][self._cell] = "".join(self._text).strip()
            self._cell = None
        if tag == "tr" and self._row is not None:
            if self._row[1]:
                self.tables[self._table].append(self._row)
            self._row = None
        if tag == "table":
            self._table = None
        if tag == "section":
            self._section = None

    def handle_data(self, data):
        if self._cell is not None:
            self._text.append(data)
        if self._section:
            self.section_text.setdefault(self._section, []).append(data)


def parse(html: str) -> Structure:
    p = Structure()
    p.feed(html)
    p.close()
    return p


def number(text: str, unit: str) -> float:
    """'57,521 km²' -> 57521.0; '12.3 %' -> 12.3."""
    assert text.endswith(unit), (text, unit)
    return float(text[: -len(unit)].strip().replace(",", ""))


def key_of(r: dict[str, str]) -> tuple[str, str, str, str]:
    return (r["species"], r["scenario"], r.get("model", ""), r["period"])


# --- static checks -------------------------------------------------------------------------------------------------

def test_the_run_writes_the_report_and_its_manifest_lists_it(run):
    p = run / REPORT_FILE
    assert p.is_file() and p.stat().st_size > 100_000
    man = json.loads((run / "manifest.json").read_text(encoding="utf-8"))
    listed = {e["path"]: e["sha256"] for e in man["outputs"]}
    assert listed[REPORT_FILE] == sha256(p)
    assert all(listed.get(str(n)) for t in maps.figure_tasks(maps.run_info(run)) for n in t.names(("png",)))


def test_report_is_self_contained(html):
    """Every resource is a data: URI; nothing refers to the network or to another file."""
    assert not re.search(r"""\b(?:src|href|srcset|action|poster|data)\s*=\s*["']?\s*(?:https?:)?//""", html, re.I)
    assert not re.search(r"url\(\s*['\"]?\s*(?:https?:)?//", html, re.I)
    assert not re.search(r"<\s*(?:script|link|iframe|object|embed|base)\b", html, re.I)
    assert "@import" not in html and "@font-face" not in html
    doc = parse(html)
    assert len(doc.images) >= 20
    for img in doc.images:
        src = img["src"]
        assert src.startswith("data:image/png;base64,"), src[:60]
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1], validate=True))) as im:
            assert im.width > 300 and im.height > 200
        assert img.get("alt")
    hrefs = re.findall(r"""href\s*=\s*["']([^"']*)["']""", html)
    assert hrefs and all(h.startswith("#") for h in hrefs), [h for h in hrefs if not h.startswith("#")]


def test_html_is_well_formed(html):
    """Common practice: every opened non-void element is closed, in order, and the document
    has one html, head, title and body."""
    doc = parse(html)
    assert not doc.errors, doc.errors[:5]
    assert not doc.stack, f"left open: {doc.stack}"
    assert html.lstrip().lower().startswith("<!doctype html>")
    for tag in ("html", "head", "title", "body", "main"):
        assert len(re.findall(rf"<{tag}[\s>]", html)) == 1, tag
    assert '<meta charset="utf-8">' in html


def test_report_carries_the_cautions(html):
    doc = parse(html)
    text = " ".join(" ".join(doc.section_text["cautions"]).split())
    for c in CAUTIONS:
        assert " ".join(c.split()) in text
    low = text.lower()
    for phrase in ("potential upper limit", "not a forecast", "expert", "local regulations", "agencies", "extrapolation",
                   "climate models disagree"):
        assert phrase in low, phrase
    page = " ".join(html.split()).lower()
    assert "not a forecast" in page.split("<main>")[0]  # also said before anything else


def test_report_sections(html):
    for sid in ("run", "model", "maps", "tables", "cautions", "provenance"):
        assert f'<section id="{sid}">' in html
    doc = parse(html)
    run_text = " ".join(doc.section_text["run"])
    assert 'name = "demo"' in run_text and "[projection]" in run_text  # the config text
    assert "rasterio" in run_text and "matplotlib" in run_text  # versions
    model_text = " ".join(doc.section_text["model"])
    assert "Acting as limits" in model_text and "acts as a limiting factor" in model_text


def test_diagnostics_and_limits_follow_diagnostics_csv(run, html):
    doc = parse(html)
    model_text = " ".join(" ".join(doc.section_text["model"]).split())
    rows = read_rows(run / "diagnostics.csv")
    for sp in dict.fromkeys(r["species"] for r in rows):
        limits = [r["factor"] for r in rows if r["species"] == sp and r["verdict"] == "acts as a limiting factor"]
        assert f"Acting as limits: {', '.join(limits)}." in model_text, sp
        for r in rows:
            if r["species"] == sp and r["verdict"] != "acts as a limiting factor":
                assert f"{r['factor']} ({r['verdict']})" in model_text


def test_summary_tables_show_the_numbers_of_summary_csv(run, html):
    doc = parse(html)
    rows = {key_of(r): r for r in read_rows(run / "summary.csv")}
    futures = doc.tables["table-futures"]
    ensembles = doc.tables["table-ensemble"]
    present = doc.tables["table-present"]
    n_fut = sum(1 for k in rows if k[1] != "present" and k[2] != "ensemble")
    assert len(futures) == n_fut and len(ensembles) == sum(1 for k in rows if k[2] == "ensemble")
    assert len(present) == sum(1 for k in rows if k[1] == "present")
    for key, cells in futures:
        r = rows[key_of(key)]
        for z in ("stable", "release", "constraint", "opens", "closes", "absent"):
            shown = number(cells[f"area_km2_{z}"], "km²")
            assert shown == pytest.approx(float(r[f"area_km2_{z}"]), abs=0.51 if shown >= 100 else 0.051), (key, z)
        assert number(cells["share_novel"], "%") == pytest.approx(100 * float(r["share_novel"]), abs=0.051)
    for key, cells in ensembles:
        r = rows[key_of(key)]
        robust = float(r["area_km2_robust"]) / float(r["area_km2"])
        assert number(cells["share_robust"], "%") == pytest.approx(100 * robust, abs=0.051)
        assert number(cells["mean_agreement"], "%") == pytest.approx(100 * float(r["mean_agreement"]), abs=0.051)
        assert number(cells["area_km2_uncertain"], "km²") == pytest.approx(float(r["area_km2_uncertain"]), abs=0.51)
    for key, cells in present:
        r = rows[key_of(key)]
        assert number(cells["area_km2"], "km²") == pytest.approx(float(r["area_km2"]), abs=0.51)
    zones = doc.tables.get("table-zones")
    if (run / "zones.csv").is_file():
        zrows = read_rows(run / "zones.csv")
        assert zones and len(zones) == min(len(zrows), 500)
        assert number(zones[0][1]["zone_area_km2"], "km²") == pytest.approx(float(zrows[0]["zone_area_km2"]), abs=0.51)


def test_provenance_lists_output_checksums(run, html):
    """Written before the manifest, the report lists every other output with its checksum."""
    doc = parse(html)
    listed = {cells["path"]: cells for _k, cells in doc.tables["table-outputs"]}
    on_disk = {p.relative_to(run).as_posix() for p in run.rglob("*") if p.is_file()} - {REPORT_FILE, "manifest.json"}
    assert set(listed) == on_disk
    for rel in ("summary.csv", "model.json", "ceiling.nc", "transitions.csv"):
        assert listed[rel]["sha256"] == sha256(run / rel), rel


# --- the results section, against the run's own tables ------------------------------------------------------------

def median(values: list[float]) -> float:
    v = sorted(values)
    n = len(v)
    return v[n // 2] if n % 2 else (v[n // 2 - 1] + v[n // 2]) / 2


def test_results_table_shows_the_medians_and_the_ensemble_of_summary_csv(run, html):
    doc = parse(html)
    rows = read_rows(run / "summary.csv")
    tables = {k: v for k, v in doc.tables.items() if k.startswith("results-table-")}
    assert len(tables) == len({r["species"] for r in rows})
    checked = 0
    for _tid, trs in tables.items():
        for key, cells in trs:
            same = [r for r in rows if (r["species"], r["scenario"], r["period"]) == (key["species"], key["scenario"], key["period"])]
            models = [r for r in same if r["model"] not in ("", "ensemble")]
            ens = [r for r in same if r["model"] == "ensemble"]
            assert models and len(ens) == 1, key
            for zone in ("release", "constraint"):
                col = f"area_km2_{zone}"
                want = median([float(r[col]) for r in models])
                shown = number(cells[col], "km²")
                assert shown == pytest.approx(want, abs=0.51 if shown >= 100 else 0.051), (key, col)
                assert number(cells[f"robust_{col}"], "km²") == pytest.approx(float(ens[0][col]), abs=0.51), (key, col)
            want = 100 * median([float(r["share_novel"]) for r in models])
            assert number(cells["share_novel"], "%") == pytest.approx(want, abs=0.051), key
            checked += 1
    assert checked == len({(r["species"], r["scenario"], r["period"]) for r in rows if r["scenario"] != "present"})
    # every number names its source: table file and column
    for m in re.finditer(r'<td class="num" data-col="([^"]+)" data-src="([^"]+)"', html):
        col, src = m.groups()
        assert src.startswith("summary.csv: ") and col.replace("robust_", "") in src, (col, src)


def test_results_name_the_main_shift_of_limiting_factor_from_transitions_csv(run, html):
    """Recomputed here from transitions.csv: per scenario at the last period, the pair of factors
    (now -> later, different) with the largest median area over the climate models; its share is
    the median over models of that area over the area the first factor limits now."""
    rows = read_rows(run / "transitions.csv")
    sp = rows[0]["species"]
    text = " ".join(" ".join(parse(html).section_text["results"]).split())
    for scenario in dict.fromkeys(r["scenario"] for r in rows if r["species"] == sp):
        mine = [r for r in rows if r["species"] == sp and r["scenario"] == scenario]
        last = max({r["period"] for r in mine})
        mine = [r for r in mine if r["period"] == last]
        models = sorted({r["model"] for r in mine})
        now = {(r["model"], r["limiting_now"]): 0.0 for r in mine}
        for r in mine:
            now[(r["model"], r["limiting_now"])] += float(r["area_km2"])
        pairs = {(r["limiting_now"], r["limiting_later"]) for r in mine if r["limiting_now"] != r["limiting_later"]}

        def moved(pair, model):
            return sum(float(r["area_km2"]) for r in mine if r["model"] == model and (r["limiting_now"], r["limiting_later"]) == pair)

        frm, to = max(pairs, key=lambda p: median([moved(p, m) for m in models]))
        share = median([moved((frm, to), m) / now[(m, frm)] for m in models if now[(m, frm)] > 0])
        sentence = re.search(rf"Under {re.escape(scenario)} by {re.escape(last)}, ([\d.]+ %) of the area limited by "
                             rf"[^()]*\({re.escape(frm)}\) becomes limited by [^()]*\({re.escape(to)}\)", text)
        assert sentence, (scenario, frm, to, text[:600])
        assert number(sentence.group(1), "%") == pytest.approx(100 * share, abs=0.051)
    assert "Source: transitions.csv: area_km2" in text


def test_results_rank_the_zones_by_their_share_in_constraint(run, html):
    if not (run / "zones.csv").is_file():
        pytest.skip("the demo has no zones")
    doc = parse(html)
    zrows = read_rows(run / "zones.csv")
    ranked = {k: [(key["zone"], cells) for key, cells in v if "zone" in key] for k, v in doc.tables.items()
              if k.startswith("results-zones-")}
    assert ranked
    for tid, trs in ranked.items():
        sp, scenario, period = re.search(r'<table id="%s"[^>]*data-species="([^"]*)" data-scenario="([^"]*)" '
                                         r'data-period="([^"]*)"' % tid, html).groups()
        ens = {r["zone_id"]: r for r in zrows if (r["species"], r["scenario"], r["model"], r["period"])
               == (sp, scenario, "ensemble", period)}
        want = sorted(ens, key=lambda z: -float(ens[z]["area_km2_constraint"]) / float(ens[z]["area_km2"]))
        shown = [z for z, _c in trs]
        assert shown == want[: len(shown)] and len(shown) == min(10, len(want)), tid
        for z, cells in trs:
            r = ens[z]
            share = 100 * float(r["area_km2_constraint"]) / float(r["area_km2"])
            assert number(cells["share_constraint"], "%") == pytest.approx(share, abs=0.051), (tid, z)


# --- the report in a real browser -------------------------------------------------------------------------------

class Chromium:
    """Headless Chromium driven over the DevTools protocol on a pipe (fds 3 and 4 of the child)."""

    def __init__(self, profile: Path, width: int = 1280, height: int = 1600):
        to_r, to_w = os.pipe()
        from_r, from_w = os.pipe()
        child_in = fcntl.fcntl(to_r, fcntl.F_DUPFD_CLOEXEC, 10)
        child_out = fcntl.fcntl(from_w, fcntl.F_DUPFD_CLOEXEC, 10)
        os.close(to_r)
        os.close(from_w)

        def fds():  # in the child, before exec: the protocol pipe on fds 3 (in) and 4 (out)
            os.dup2(child_in, 3)
            os.dup2(child_out, 4)

        self.log = tempfile.TemporaryFile()
        self.proc = subprocess.Popen(
            [CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--window-size={width},{height}",
             "--remote-debugging-pipe", "about:blank"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=self.log, preexec_fn=fds, close_fds=False)
        os.close(child_in)
        os.close(child_out)
        self.w, self.r = to_w, from_r
        self.messages: queue.Queue = queue.Queue()
        self.events: list[dict] = []
        self.n = 0
        self.session: str | None = None
        threading.Thread(target=self._read, daemon=True).start()

    def _read(self) -> None:
        buf = b""
        while True:
            chunk = os.read(self.r, 1 << 16)
            if not chunk:
                self.messages.put(None)
                return
            buf += chunk
            while b"\0" in buf:
                msg, buf = buf.split(b"\0", 1)
                self.messages.put(json.loads(msg))

    def _next(self, deadline: float) -> dict:
        try:
            m = self.messages.get(timeout=max(0.05, deadline - time.monotonic()))
        except queue.Empty:
            raise TimeoutError("no answer from chromium") from None
        if m is None:
            self.log.seek(0)
            raise RuntimeError("chromium closed the pipe: " + self.log.read().decode(errors="replace")[-2000:])
        return m

    def send(self, method: str, params: dict | None = None, *, browser: bool = False, timeout: float = 60) -> dict:
        self.n += 1
        msg = {"id": self.n, "method": method, "params": params or {}}
        if self.session and not browser:
            msg["sessionId"] = self.session
        os.write(self.w, json.dumps(msg).encode() + b"\0")
        deadline = time.monotonic() + timeout
        while True:
            m = self._next(deadline)
            if m.get("id") == self.n:
                if "error" in m:
                    raise RuntimeError(f"{method}: {m['error']}")
                return m.get("result", {})
            self.events.append(m)

    def wait_for(self, event: str, timeout: float = 60) -> dict:
        for e in self.events:
            if e.get("method") == event:
                return e
        deadline = time.monotonic() + timeout
        while True:
            m = self._next(deadline)
            self.events.append(m)
            if m.get("method") == event:
                return m

    def open(self, url: str, width: int = 1280, height: int = 1600) -> None:
        target = self.send("Target.createTarget", {"url": "about:blank"}, browser=True)["targetId"]
        self.session = self.send("Target.attachToTarget", {"targetId": target, "flatten": True}, browser=True)["sessionId"]
        for domain in ("Page", "Runtime", "Log", "Network"):
            self.send(f"{domain}.enable")
        self.send("Emulation.setDeviceMetricsOverride", {"width": width, "height": height, "deviceScaleFactor": 1,
                                                         "mobile": False})
        self.send("Page.navigate", {"url": url})
        self.wait_for("Page.loadEventFired")

    def evaluate(self, expression: str):
        res = self.send("Runtime.evaluate", {"expression": expression, "returnByValue": True, "awaitPromise": True})
        if "exceptionDetails" in res:
            raise RuntimeError(res["exceptionDetails"])
        return res["result"].get("value")

    def problems(self) -> list[str]:
        """Console errors and warnings, exceptions, error log entries and failed loads seen so far."""
        out = []
        for e in self.events:
            m, p = e.get("method"), e.get("params", {})
            if m == "Runtime.consoleAPICalled" and p.get("type") in ("error", "warning", "assert"):
                out.append(f"console {p['type']}: {[a.get('value', a.get('description')) for a in p.get('args', [])]}")
            elif m == "Runtime.exceptionThrown":
                out.append(f"exception: {p.get('exceptionDetails', {}).get('text')}")
            elif m == "Log.entryAdded" and p.get("entry", {}).get("level") in ("error", "warning"):
                out.append(f"log {p['entry']['level']}: {p['entry'].get('text')}")
            elif m == "Network.loadingFailed":
                out.append(f"failed load: {p.get('errorText')}")
        return out

    def requests(self) -> list[str]:
        return [e["params"]["request"]["url"] for e in self.events if e.get("method") == "Network.requestWillBeSent"]

    def close(self) -> None:
        try:
            self.send("Browser.close", browser=True, timeout=10)
        except (RuntimeError, TimeoutError, OSError):
            pass
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self.w)
        self.log.close()


@pytest.fixture
def browser(tmp_path):
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium); CI installs it")
    b = Chromium(tmp_path / "profile")
    yield b
    b.close()


IMAGES_JS = """Promise.all(Array.from(document.images).map(i => i.decode().then(
  () => [i.alt, i.naturalWidth, i.naturalHeight], () => [i.alt, 0, 0])))"""
CELLS_JS = """Array.from(document.querySelectorAll('#table-futures tbody tr, #table-ensemble tbody tr')).map(tr => [
  Object.assign({}, tr.dataset),
  Object.fromEntries(Array.from(tr.cells).map(td => [td.dataset.col, td.innerText.trim()]))])"""


def test_report_in_headless_chromium(run, html, browser, tmp_path):
    browser.open((run / REPORT_FILE).resolve().as_uri())
    assert browser.problems() == []
    urls = browser.requests()
    page = (run / REPORT_FILE).resolve().as_uri()
    assert urls and urls[0] == page
    assert [u for u in urls if not (u == page or u.startswith("data:"))] == [], "requests other than data: URIs"
    images = browser.evaluate(IMAGES_JS)
    assert len(images) == len(parse(html).images) >= 20
    assert all(w > 0 and h > 0 for _alt, w, h in images), [a for a, w, _h in images if w == 0]
    assert browser.evaluate("document.title").startswith("Ceiling run report")
    # the tables as the browser shows them, against summary.csv
    rows = {key_of(r): r for r in read_rows(run / "summary.csv")}
    shown = browser.evaluate(CELLS_JS)
    assert len(shown) == sum(1 for k in rows if k[1] != "present")
    for key, cells in shown[:: max(1, len(shown) // 6)]:
        r = rows[key_of(key)]
        for z in ("release", "constraint", "stable"):
            assert number(cells[f"area_km2_{z}"], "km²") == pytest.approx(float(r[f"area_km2_{z}"]), abs=0.51), (key, z)
    caution = browser.evaluate("document.getElementById('cautions').innerText")
    assert "not a forecast" in caution and "expert" in caution
    shot = base64.b64decode(browser.send("Page.captureScreenshot", {"format": "png"})["data"])
    with Image.open(io.BytesIO(shot)) as im:
        assert im.size == (1280, 1600)
        grey = np.asarray(im.convert("L"), dtype=np.float64)
    assert grey.std() > 10.0, "the screenshot is blank"
    assert browser.problems() == []


LAYOUT_JS = """(() => {
  const h = Array.from(document.querySelectorAll('h1, h2, h3'));
  const config = document.getElementById('config');
  const nav = document.querySelector('nav.toc');
  window.scrollTo(0, document.body.scrollHeight);
  const r = nav.getBoundingClientRect();
  return {headings: h.slice(0, 2).map(e => [e.tagName, e.innerText, e.closest('section') ? e.closest('section').id : '']),
          config_details: config ? config.tagName : '', config_open: config ? config.open : null,
          config_text_shown: config ? config.querySelector('pre').checkVisibility() : null,
          header: document.querySelector('header').innerText,
          nav_position: getComputedStyle(nav).position, nav_top: r.top, nav_bottom: r.bottom,
          scrolled: window.scrollY, view: window.innerHeight};
})()"""


def test_report_opens_on_the_results_in_headless_chromium(run, browser):
    """The first heading after the title is the results; the config text is in a folded
    <details>; the header names the run folder given to ``ceiling run --out`` (not the staging
    folder); the table of contents stays in view at the end of the page."""
    browser.open((run / REPORT_FILE).resolve().as_uri(), height=900)
    got = browser.evaluate(LAYOUT_JS)
    assert got["headings"][0][0] == "H1" and got["headings"][1][:1] == ["H2"], got["headings"]
    assert got["headings"][1][2] == "results" and "Results" in got["headings"][1][1]
    assert got["config_details"] == "DETAILS" and got["config_open"] is False and got["config_text_shown"] is False
    assert str(run) in got["header"] and ".partial" not in got["header"]
    assert got["nav_position"] == "sticky"
    assert got["scrolled"] > 5 * got["view"]  # the page did scroll far
    assert 0 <= got["nav_top"] < got["view"] and got["nav_bottom"] > 0, got
    # opening the folded config shows its text
    assert browser.evaluate("(() => { const d = document.getElementById('config'); d.open = true; "
                            "return d.querySelector('pre').checkVisibility(); })()") is True
    assert browser.problems() == []


def test_the_browser_check_sees_network_requests_and_console_errors(browser, tmp_path):
    """The harness itself: a page that loads from the (loopback) network and logs an error is
    caught. Without this, the test above could pass for a harness that records nothing."""
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><head><meta charset="utf-8"><title>t</title></head><body>'
                    '<img src="http://127.0.0.1:9/x.png" alt="x"><script>console.error("boom")</script></body></html>',
                    encoding="utf-8")
    browser.open(page.as_uri())
    time.sleep(0.3)
    browser.evaluate("1")  # drain the events sent so far
    assert any(u.startswith("http://127.0.0.1:9/") for u in browser.requests())
    assert any("boom" in p for p in browser.problems())


# --- the command ------------------------------------------------------------------------------------------------------

def small_copy(run: Path, dest: Path, *, figures: bool, species: str = "sp_b") -> Path:
    """A run folder with one species, its present and one future (model-a, the first scenario
    and period): the demo's files, summary rows and manifest; with ``figures``, the demo's
    figures of that species too (else only its fit figures)."""
    rows = [r for r in read_rows(run / "summary.csv") if r["species"] == species]
    future = next((r["scenario"], r["model"], r["period"]) for r in rows if r["model"] == "model-a")
    keep = {("present", "", rows[0]["period"]), future}
    dest.mkdir()
    for name in ("model.json", "diagnostics.csv", "manifest.json"):
        shutil.copy2(run / name, dest / name)
    for name in ("summary.csv", "transitions.csv"):
        sub = [r for r in read_rows(run / name) if r["species"] == species and (r["scenario"], r["model"], r["period"]) in keep]
        with open(dest / name, "w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=list(sub[0]))
            w.writeheader()
            w.writerows(sub)
    for k in keep:
        rel = Path(species) / ("present" if k[0] == "present" else Path(*k))
        shutil.copytree(run / rel, dest / rel)
    (dest / "figures").mkdir()
    for p in (run / "figures").glob(f"fit_{species}_*.png"):
        shutil.copy2(p, dest / "figures" / p.name)
    if figures:
        for t in maps.figure_tasks(maps.run_info(dest)):
            for n in t.names(("png",)):
                (dest / n).parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(run / n, dest / n)
    return dest


def test_ceiling_report_remakes_a_missing_figure_and_the_report(run, tmp_path):
    out = tmp_path / "run"
    shutil.copytree(run, out)
    gone = out / maps.comparison_sheet_name("sp_a", "model-b", "zone")
    before = gone.read_bytes()
    gone.unlink()
    (out / REPORT_FILE).unlink()
    res = cli(["report", out])
    assert res.exit_code == 0, (res.stderr, res.exception)
    assert "made 1 figure file" in res.stdout
    assert gone.is_file() and gone.read_bytes() == before  # the same figure again
    html = (out / REPORT_FILE).read_text(encoding="utf-8")
    doc = parse(html)
    listed = {cells["path"]: cells for _k, cells in doc.tables["table-outputs"]}
    assert listed["summary.csv"]["sha256"] == sha256(out / "summary.csv")
    assert listed["summary.csv"]["status"] == "matches"
    assert listed[REPORT_FILE]["status"] == "this report (re-built after the manifest)"
    assert "manifest.json" in " ".join(doc.section_text["provenance"])


def test_ceiling_report_svg_on_a_small_run_folder(run, tmp_path):
    out = small_copy(run, tmp_path / "small", figures=False)
    res = cli(["report", out, "--svg"])
    assert res.exit_code == 0, (res.stderr, res.exception)
    info = maps.run_info(out)
    tasks = maps.figure_tasks(info)
    assert len(tasks) >= 6
    for t in tasks:
        for name in t.names(("png", "svg")):
            assert (out / name).is_file(), name
    svg = (out / maps.climate_sheet_name("sp_b", ("present", "", "1991-2020"), "svg")).read_text(encoding="utf-8")
    assert svg.lstrip().startswith("<?xml") and "<svg" in svg
    html = (out / REPORT_FILE).read_text(encoding="utf-8")
    assert parse(html).tables["table-futures"] and not parse(html).errors


def test_report_before_the_manifest_lists_checksums_computed_from_the_files(run, tmp_path):
    out = small_copy(run, tmp_path / "staged", figures=True)
    (out / "manifest.json").unlink()
    path = build_report(out, config=Path(__file__).resolve().parents[1] / "configs" / "demo.toml")
    html = path.read_text(encoding="utf-8")
    doc = parse(html)
    text = " ".join(doc.section_text["provenance"])
    assert "computed from the files when this report was built" in text
    for p in sorted(out.rglob("*")):
        if p.is_file() and p.name != REPORT_FILE:
            assert sha256(p) in text, p
    assert 'name = "demo"' in " ".join(doc.section_text["run"])


def test_ceiling_report_refuses_a_folder_that_is_not_a_run(tmp_path):
    (tmp_path / "notarun").mkdir()
    (tmp_path / "notarun" / "summary.csv").write_text("species\n", encoding="utf-8")
    for target, word in ((tmp_path / "notarun", "manifest.json"), (tmp_path / "missing", "no such folder")):
        res = cli(["report", target])
        assert res.exit_code == 2, res.stdout
        lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and lines[0].startswith("error: ") and word in lines[0], lines
        assert "Traceback" not in res.stderr
    assert not (tmp_path / "notarun" / REPORT_FILE).exists()
