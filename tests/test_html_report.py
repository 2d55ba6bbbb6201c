"""The HTML report: self-contained, escaped, complete — and checked in a real browser.

The browser check drives Debian's headless Chromium through its chromedriver
with the W3C WebDriver protocol (W3C Recommendation "WebDriver", 2018) over
plain HTTP from the standard library, so nothing is downloaded. CI installs
the Debian packages ``chromium`` and ``chromium-driver``; without them the
browser test fails with a message saying so.

Other outside references: SHA-256 of the input file from :mod:`hashlib`
(FIPS 180-4); the HTML is parsed with the standard library's
:class:`html.parser.HTMLParser`; PNG images decode with matplotlib's reader.
"""

from __future__ import annotations

import base64
import hashlib
import html as html_lib
import io
import json
import os
import re
import shutil
import socket
import struct
import subprocess
import tempfile
import time
import urllib.error
import urllib.request
from html.parser import HTMLParser

import numpy as np
import pytest
from matplotlib.image import imread

import diffkit
from diffkit.diffusion import estimate_diffusion
from diffkit.errors import UsageError
from diffkit.msd import compute_msd
from diffkit.report.html import (REPORT_CAUTIONS, CampaignReport, CandidateSection, RunSection,
                                 render_report, write_report)
from diffkit.report.tables import run_overview
from diffkit.trust import assess_run

EVIL = "<script>alert(1)</script>"
EVIL_PATH = '/data/"><img src=x onerror=alert(2)>/run.xdatcar'


# =========================================================================== the report
def _candidate(name, temps, Ea, seed, *, with_msd=False, with_running=False, files_dir=None):
    camp = diffkit.arrhenius_campaign(temperatures_K=temps, n_ions=12, n_frames=300,
                                      framework={"P": 3, "S": 12}, Ea_eV=Ea, seed=seed)
    runs, T, D, se, bounds, vols = [], [], [], [], [], []
    for k, r in enumerate(camp.runs):
        traj = r.trajectory
        if files_dir is not None and k == 0:
            # one run read back from a real file, so its provenance holds a file hash
            path = diffkit.write_run(r, files_dir, fmt="extxyz")
            traj = diffkit.read_trajectory(path)
        a = assess_run(traj, "Li")
        extra = {}
        if with_msd:
            extra["msd"] = compute_msd(traj, "Li")
        if with_msd and k == len(camp.runs) - 1:
            extra["host_msd"] = {s: compute_msd(traj, s, per_ion=False, reference="all")
                                 for s in ("P", "S")}
        if with_running and k == len(camp.runs) - 1:
            t = traj.duration_ps * np.array([0.4, 0.6, 0.8, 1.0])
            ests = [estimate_diffusion(compute_msd(traj.window(0.0, L), "Li")) for L in t]
            extra["running"] = {"times_ps": t,
                                "D_cm2_per_s": [e.D_cm2_per_s for e in ests],
                                "lower_cm2_per_s": [e.D_interval95_cm2_per_s[0] for e in ests],
                                "upper_cm2_per_s": [e.D_interval95_cm2_per_s[1] for e in ests]}
        prov = dict(traj.provenance)
        if k == 1:
            prov["note_from_user"] = EVIL_PATH
        runs.append(RunSection(label=f"{traj.temperature_K:g} K", temperature_K=traj.temperature_K,
                               assessment=a, facts=run_overview(traj), provenance=prov, **extra))
        d = a.diffusion
        vols.append(traj.mean_volume_A3)
        if d.is_upper_bound:
            bounds.append((traj.temperature_K, d.D_cm2_per_s))
        elif np.isfinite(d.D_cm2_per_s):
            T.append(traj.temperature_K)
            D.append(d.D_cm2_per_s)
            se.append(d.D_stderr_cm2_per_s)
    summary = diffkit.summarize_candidate(name, T, D, se, n_ions=12, volumes_A3=vols[0],
                                          species="Li", upper_bounds=bounds or None)
    return CandidateSection(name=name, summary=summary, runs=tuple(runs))


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    files = tmp_path_factory.mktemp("inputs")
    cands = (
        _candidate("Fast thiophosphate α (fictional)", (600, 800, 1000), 0.25, 11,
                   with_msd=True, with_running=True, files_dir=str(files)),
        _candidate(EVIL, (700, 1000), 0.3, 12),
        _candidate("Sluggish oxide & co", (500, 1100), 0.6, 13),
        CandidateSection(name="Broken input", summary=None, runs=(
            RunSection(label="800 K", temperature_K=800.0,
                       failure="run.xdatcar: frame 12 (line 4410) has 95 atoms, expected 96"),)),
    )
    src = [s for s in cands[0].runs[0].provenance["sources"] if "sha256" in s][0]
    report = CampaignReport(title=f"Screening <b>round</b> {EVIL}", candidates=cands,
                            settings={"target_temperature_K": 300.0, "haven_ratio": 1.0,
                                      "label": EVIL},
                            provenance={"manifest": EVIL_PATH},
                            introduction="Fictional candidates from the synthetic generators.")
    out = tmp_path_factory.mktemp("report") / "report.html"
    write_report(out, report)
    return report, str(out), src


@pytest.fixture(scope="module")
def page(campaign):
    return open(campaign[1], encoding="utf-8").read()


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags = []        # (tag, attrs dict)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def _tags(text):
    p = _Tags()
    p.feed(text)
    return p.tags


# =========================================================================== source checks
def test_report_is_self_contained(page):
    tags = _tags(page)
    names = [t for t, _ in tags]
    assert "script" not in names and "link" not in names and "iframe" not in names
    for t, a in tags:
        for key in ("src", "href", "data", "action", "poster"):
            if key in a:
                v = a[key]
                assert v.startswith("data:image/") or v.startswith("#"), (t, key, v[:60])
    assert not re.search(r"url\(\s*['\"]?(?!data:)", page)      # no external CSS resources
    csp = [a for t, a in tags if t == "meta" and a.get("http-equiv") == "Content-Security-Policy"]
    assert csp and "default-src 'none'" in csp[0]["content"]


def test_user_strings_are_escaped(page):
    assert EVIL not in page
    assert html_lib.escape(EVIL) in page
    assert "<img src=x" not in page
    assert "<b>round</b>" not in page and "&lt;b&gt;round&lt;/b&gt;" in page
    assert "Sluggish oxide &amp; co" in page
    # only the images the report made are <img> elements
    assert all(a.get("src", "").startswith("data:image/") for t, a in _tags(page) if t == "img")


def test_summary_table_has_one_row_per_candidate_with_the_results(campaign, page):
    report, _, _ = campaign
    m = re.search(r'<table class="summary" id="summary-table">.*?<tbody>(.*?)</tbody>', page, re.S)
    rows = re.findall(r"<tr>(.*?)</tr>", m.group(1), re.S)
    assert len(rows) == len(report.candidates)
    for row, cand in zip(rows, report.candidates):
        assert html_lib.escape(cand.name) in row
        s = cand.summary
        if s is None:
            assert "—" in row
            continue
        if s.Ea_eV is not None:
            assert f"{s.Ea_eV:.3f} ± {s.Ea_stderr_eV:.3f}" in row
        assert html_lib.escape(s.tier) in row
        for r in cand.runs:
            assert r.assessment.verdict in row
    # the failed run shows its reason in its section
    assert "frame 12 (line 4410) has 95 atoms, expected 96" in page


def test_summary_states_the_cautions(page):
    summary = page[page.index('id="summary"'):page.index('id="cand-1"')]
    for c in REPORT_CAUTIONS:
        assert html_lib.escape(c) in summary
    text = html_lib.unescape(re.sub(r"<[^>]+>", " ", summary))
    for words in ("screening estimates", "defer to measurement", "one conduction mechanism",
                  "no phase change", "air- or moisture-sensitive", "toxic gases",
                  "local safety rules", "licensed practice"):
        assert words in text


def test_sections_hold_checks_advice_figures_and_provenance(campaign, page):
    report, _, src = campaign
    # every check of every assessed run is listed with its status and explanation
    for cand in report.candidates:
        for r in cand.runs:
            if r.assessment is None:
                continue
            for c in r.assessment.checks:
                assert html_lib.escape(c.explanation) in page
            assert html_lib.escape(r.assessment.advice[0]) in page
    # provenance: the input file's SHA-256 as hashlib computes it (FIPS 180-4)
    digest = hashlib.sha256(open(src["path"], "rb").read()).hexdigest()
    assert src["sha256"] == digest and digest in page
    assert html_lib.escape(diffkit.__version__) in page
    # figures: MSD, per-axis and hop figures of the first candidate, host and convergence once
    for alt in ("MSD of run 600 K", "per-axis MSD of run 1000 K", "hops of run 800 K",
                "convergence of run 1000 K", "host MSD of run 1000 K",
                "Arrhenius overview of all candidates"):
        assert f'alt="{alt}' in page


def test_embedded_images_decode(page):
    imgs = [a for t, a in _tags(page) if t == "img"]
    assert len(imgs) >= 15
    for a in imgs:
        head, data = a["src"].split(",", 1)
        assert head == "data:image/png;base64"
        img = imread(io.BytesIO(base64.b64decode(data)), format="png")
        assert img.shape[0] == int(a["height"]) and img.shape[1] == int(a["width"])
        assert img.std() > 0                   # not a blank picture


def test_svg_embedding_and_input_checks(campaign):
    report, _, _ = campaign
    small = CampaignReport(title="one", candidates=(report.candidates[1],))
    text = render_report(small, image_format="svg")
    assert "data:image/svg+xml;base64," in text and "data:image/png" not in text
    svg = base64.b64decode(re.search(r'data:image/svg\+xml;base64,([^"]+)', text).group(1))
    assert b"<svg" in svg
    with pytest.raises(UsageError):
        render_report(small, image_format="gif")
    with pytest.raises(UsageError):
        render_report(CampaignReport(title="x", candidates=("not a section",)))


def test_run_figures_can_be_left_out(campaign):
    report, _, _ = campaign
    one = CampaignReport(title="t", candidates=(report.candidates[0],))
    text = render_report(one, run_figures=False)
    alts = re.findall(r'<img src="data:image/png;base64,[^"]+" alt="([^"]*)"', text)
    assert alts == ["Arrhenius plot of " + html_lib.escape(report.candidates[0].name)]
    for c in report.candidates[0].runs[0].assessment.checks:      # the tables stay
        assert html_lib.escape(c.explanation) in text


def test_write_report_is_atomic(tmp_path, campaign):
    report, _, _ = campaign
    target = tmp_path / "r.html"
    target.write_text("old report", encoding="utf-8")
    with pytest.raises(UsageError):
        write_report(target, CampaignReport(title="x", candidates=(CandidateSection(
            name="y", runs=("not a run",)),)))
    assert target.read_text(encoding="utf-8") == "old report"
    small = CampaignReport(title="small", candidates=(CandidateSection(name="only a name"),))
    assert write_report(target, small) == str(target)
    assert "only a name" in target.read_text(encoding="utf-8")
    assert sorted(os.listdir(tmp_path)) == ["r.html"]


def test_results_as_dicts_give_the_same_tables(campaign):
    report, _, _ = campaign
    cand = report.candidates[2]
    as_dicts = CandidateSection(
        name=cand.name, summary=cand.summary.to_dict(),
        runs=tuple(RunSection(label=r.label, temperature_K=r.temperature_K,
                              assessment=r.assessment.to_dict(), facts=r.facts)
                   for r in cand.runs))
    a = render_report(CampaignReport(title="t", candidates=(cand,), created_utc="now"),
                      run_figures=False)
    b = render_report(CampaignReport(title="t", candidates=(as_dicts,), created_utc="now"),
                      run_figures=False)

    def tables(text):
        return re.findall(r"<table.*?</table>", text, re.S)

    assert tables(a)[0] == tables(b)[0]                 # the summary table
    assert [x for x in tables(a) if 'class="checks"' in x] == \
        [x for x in tables(b) if 'class="checks"' in x]


# =========================================================================== the browser
CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
CHROMEDRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"


class _Browser:
    """Headless Chromium through chromedriver's W3C WebDriver HTTP interface."""

    def __init__(self, artefacts):
        for exe, pkg in ((CHROMIUM, "chromium"), (CHROMEDRIVER, "chromium-driver")):
            if not os.access(exe, os.X_OK):
                pytest.fail(f"the browser test needs {exe} (Debian package {pkg!r}: "
                            "apt-get install chromium chromium-driver); CI installs it",
                            pytrace=False)
        s = socket.socket()
        s.bind(("127.0.0.1", 0))
        self.port = s.getsockname()[1]
        s.close()
        self.profile = tempfile.mkdtemp(prefix="diffkit-chromium-", dir=artefacts)
        self.proc = subprocess.Popen([CHROMEDRIVER, f"--port={self.port}"],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        deadline = time.monotonic() + 20
        while True:
            try:
                if self._call("GET", "/status", timeout=2)["value"].get("ready"):
                    break
            except (OSError, ValueError):
                pass
            if time.monotonic() > deadline or self.proc.poll() is not None:
                self.close()
                pytest.fail(f"chromedriver ({CHROMEDRIVER}) did not start", pytrace=False)
            time.sleep(0.1)
        caps = {"browserName": "chrome", "unhandledPromptBehavior": "ignore",
                "goog:loggingPrefs": {"browser": "ALL"},
                "goog:chromeOptions": {"binary": CHROMIUM, "args": [
                    "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                    "--disable-quic", "--no-first-run", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync", "--hide-scrollbars",
                    f"--user-data-dir={self.profile}", "--window-size=1280,1000"]}}
        r = self._call("POST", "/session", {"capabilities": {"alwaysMatch": caps}}, timeout=60)
        if "sessionId" not in r.get("value", {}):
            self.close()
            pytest.fail(f"Chromium did not start a session: {r.get('value')}", pytrace=False)
        self.session = f"/session/{r['value']['sessionId']}"

    def _call(self, method, path, body=None, timeout=60):
        data = None if body is None else json.dumps(body).encode()
        req = urllib.request.Request(f"http://127.0.0.1:{self.port}{path}", data=data,
                                     method=method, headers={"Content-Type": "application/json"})
        try:
            with urllib.request.urlopen(req, timeout=timeout) as f:
                return json.loads(f.read())
        except urllib.error.HTTPError as exc:
            return json.loads(exc.read())

    def do(self, method, path, body=None):
        return self._call(method, self.session + path, body)

    def open(self, path):
        return self.do("POST", "/url", {"url": "file://" + os.path.abspath(path)})

    def js(self, script):
        r = self.do("POST", "/execute/sync", {"script": script, "args": []})
        v = r.get("value")
        assert not (isinstance(v, dict) and "error" in v and "message" in v), v
        return v

    def console(self):
        return self.do("POST", "/se/log", {"type": "browser"})["value"]

    def alert_open(self):
        v = self.do("GET", "/alert/text")["value"]
        return not (isinstance(v, dict) and v.get("error") == "no such alert")

    def full_page_png(self):
        r = self.do("POST", "/goog/cdp/execute", {"cmd": "Page.captureScreenshot", "params": {
            "format": "png", "captureBeyondViewport": True}})
        return base64.b64decode(r["value"]["data"])

    def close(self):
        try:
            if hasattr(self, "session"):
                self.do("DELETE", "")
        finally:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
            shutil.rmtree(self.profile, ignore_errors=True)


@pytest.fixture(scope="module")
def artefacts(tmp_path_factory):
    where = os.environ.get("DIFFKIT_TEST_ARTIFACTS")
    if where:
        os.makedirs(where, exist_ok=True)
        return where
    return str(tmp_path_factory.mktemp("artefacts"))


@pytest.fixture(scope="module")
def browser(artefacts):
    b = _Browser(artefacts)
    yield b
    b.close()


@pytest.mark.slow
def test_report_in_a_real_browser(browser, campaign, artefacts):
    report, path, _ = campaign
    r = browser.open(path)
    assert r.get("value") is None, r
    state = browser.js(
        "const imgs = Array.from(document.images);"
        "const rows = document.querySelectorAll('#summary-table tbody tr');"
        "return {ready: document.readyState, rows: rows.length,"
        " names: Array.from(rows).map(r => r.querySelector('td.name').textContent),"
        " images: imgs.map(i => [i.complete, i.naturalWidth, i.naturalHeight]),"
        " scripts: document.scripts.length,"
        " resources: performance.getEntriesByType('resource').length,"
        " title: document.title,"
        " height: document.documentElement.scrollHeight}")
    assert state["ready"] == "complete"
    # no console errors (a blocked script or resource would log one)
    errors = [e for e in browser.console() if e.get("level") in ("SEVERE", "ERROR")]
    assert errors == []
    # one summary row per candidate, names shown as text — the script name included
    assert state["rows"] == len(report.candidates)
    assert state["names"] == [c.name for c in report.candidates]
    assert EVIL in state["names"] and EVIL in state["title"]
    assert state["scripts"] == 0 and not browser.alert_open()
    # every embedded image decoded with a non-zero size; nothing fetched from anywhere
    assert len(state["images"]) == page_images(path)
    assert all(c and w > 0 and h > 0 for c, w, h in state["images"])
    assert state["resources"] == 0
    # the screenshot is kept as an artefact of the test
    png = browser.full_page_png()
    shot = os.path.join(artefacts, "report_full_page.png")
    with open(shot, "wb") as f:
        f.write(png)
    # PNG header (ISO/IEC 15948): signature, then the IHDR chunk with width and height
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and png[12:16] == b"IHDR"
    width, height = struct.unpack(">II", png[16:24])
    assert width >= 1000 and height >= min(state["height"], 4000)
    assert len(png) > 100_000            # a page with figures, not a blank canvas


def page_images(path):
    return open(path, encoding="utf-8").read().count('<img src="data:image/')


def test_pre_rendered_run_images_give_the_same_report(campaign, monkeypatch):
    import dataclasses

    import diffkit.report.html as report_html
    from diffkit.report.html import render_run_images

    report, _, _ = campaign
    cand = report.candidates[0]
    drawn = CampaignReport(title="t", candidates=(cand,), created_utc="2026-01-02T03:04:05+00:00")
    ready = dataclasses.replace(drawn, candidates=(dataclasses.replace(cand, runs=tuple(
        dataclasses.replace(r, images=render_run_images(r)) for r in cand.runs)),))
    expected = render_report(drawn)
    # the images are records of plain data (they are kept in JSON files by campaigns)
    images = ready.candidates[0].runs[0].images
    assert json.loads(json.dumps(images)) == list(images)
    assert [im["alt"] for im in images] == re.findall(
        r'alt="([^"]*)"', expected)[1:1 + len(images)]  # after the candidate's Arrhenius plot

    def refuse(*_a, **_k):
        raise AssertionError("run figures drawn although they were given")

    with monkeypatch.context() as mp:
        mp.setattr(report_html, "_run_figures", refuse)
        assert render_report(ready) == expected  # the same page to the byte, nothing drawn
        stub = {"format": "png", "dpi": 110.0, "caption": "a given figure", "alt": "given",
                "width": 3, "height": 2, "data_base64": "iVBORw0KGgo="}
        one = dataclasses.replace(ready, candidates=(dataclasses.replace(cand, runs=(
            dataclasses.replace(cand.runs[0], images=(stub,)),)),))
        text = render_report(one)
        assert 'src="data:image/png;base64,iVBORw0KGgo=" alt="given" width="3" height="2"' in text
        assert "<figcaption>a given figure</figcaption>" in text
    # made for another format or resolution, or not base64: drawn again as without them
    assert render_report(ready, dpi=80) == render_report(drawn, dpi=80)
    svg = render_report(ready, image_format="svg")
    assert "data:image/png" not in svg and svg == render_report(drawn, image_format="svg")
    bad = dict(images[0], data_base64='x"><script>alert(3)</script>')
    spoilt = dataclasses.replace(ready, candidates=(dataclasses.replace(cand, runs=(
        dataclasses.replace(cand.runs[0], images=(bad,) + tuple(images[1:])),) + cand.runs[1:]),))
    assert render_report(spoilt) == expected
    with pytest.raises(UsageError):
        render_run_images("not a run")


def test_pre_rendered_candidate_images_give_the_same_report(campaign, monkeypatch):
    import dataclasses

    import diffkit.report.html as report_html
    from diffkit.report.html import render_candidate_images

    report, _, _ = campaign
    drawn = dataclasses.replace(report, created_utc="2026-01-02T03:04:05+00:00")
    given = {c.name: render_candidate_images(c) for c in drawn.candidates}
    # one Arrhenius plot per candidate with a fit; none for those without
    fitted = [int(report_html._get(c.summary, "fit") is not None) for c in drawn.candidates]
    assert [len(v) for v in given.values()] == fitted and fitted[:2] == [1, 1]
    assert json.loads(json.dumps(given[drawn.candidates[0].name])) == \
        list(given[drawn.candidates[0].name])
    ready = dataclasses.replace(drawn, candidates=tuple(
        dataclasses.replace(c, images=given[c.name]) for c in drawn.candidates))
    expected = render_report(drawn)

    def refuse(*_a, **_k):
        raise AssertionError("Arrhenius plot drawn although it was given")

    with monkeypatch.context() as mp:
        mp.setattr(report_html.plots, "arrhenius_figure", refuse)
        assert render_report(ready) == expected  # the same page to the byte
    # made at another resolution: drawn again, as without them
    assert render_report(ready, dpi=80) == render_report(drawn, dpi=80)
    # a plot that could not be drawn becomes the same one-line note either way
    with monkeypatch.context() as mp:
        mp.setattr(report_html.plots, "arrhenius_figure",
                   lambda *_a, **_k: (_ for _ in ()).throw(ValueError("no axes")))
        failed = render_candidate_images(drawn.candidates[0])
        assert failed[0]["error"].endswith("ValueError: no axes")
        one = dataclasses.replace(drawn, candidates=drawn.candidates[:1])
        assert render_report(dataclasses.replace(one, candidates=(dataclasses.replace(
            one.candidates[0], images=failed),))) == render_report(one)
    with pytest.raises(UsageError):
        render_candidate_images("not a candidate")
