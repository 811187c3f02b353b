"""The confidential board report: contents, placement, no leak into the bundle, a real browser.

Outside references: Debian's chromium (headless) renders the HTML and reports
whether each embedded figure decoded (``naturalWidth > 0``); Python's
``html.parser`` and ``json`` read the files back; pyarrow reads the bundle.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser

import pyarrow.parquet as pq
import pytest

from aggpub.audit.report import AUDIT_JSON, REPORT_HTML
from aggpub.bundle.guide import CAUTIONS
from aggpub.cli import main
from aggpub.demo import write_demo_inputs


@pytest.fixture(scope="module")
def released(tmp_path_factory):
    """One CLI release of a 2,000-resident demo town with its default sibling report."""
    root = tmp_path_factory.mktemp("report")
    town = write_demo_inputs(root / "inputs", n_people=2000)
    out = root / "out" / "bundle"
    out.parent.mkdir()
    code = main(["release", "--policy", str(town["policy"]), "--edges", str(town["edges"]), "--nodes",
                 str(town["people"]), "--out", str(out), "--quiet"])
    assert code == 0
    return town, out, out.parent / "bundle.report"


def test_report_sits_beside_the_bundle_with_every_required_figure(released):
    _, out, report = released
    assert sorted(p.name for p in report.iterdir()) == [AUDIT_JSON, REPORT_HTML]
    assert not any(p.name in (AUDIT_JSON, REPORT_HTML) for p in out.rglob("*"))
    audit = json.loads((report / AUDIT_JSON).read_text())
    assert audit["confidential"] is True
    assert {"ks", "wasserstein1", "l1"} <= set(audit["degree_distribution"])
    for name in ("superedge_cells", "contact_matrix:age_band", "contact_matrix:neighbourhood", "cut_queries",
                 "supernode_degree_totals"):
        assert {"mean_absolute_error", "median_relative_error", "p90_relative_error"} <= set(audit["queries"][name])
    assert audit["gate"]["passed"] is True
    assert audit["error_split"]["degree_ks"]["grouping"] == audit["degree_distribution"]["grouping_loss"]["ks"]
    assert len(audit["degree_distribution"]["curves"]["true_pmf"]) == audit["degree_distribution"][
        "true_max_degree"] + 1


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.marks, self.links = [], [], []
        self._in_mark = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        if tag in ("link", "script") and (a.get("href") or a.get("src")):
            self.links.append(a.get("href") or a.get("src"))
        if tag == "div" and "mark" in (a.get("class") or ""):
            self.marks.append(a["class"])


def test_report_html_is_self_contained_and_marked_confidential(released):
    _, _, report = released
    text = (report / REPORT_HTML).read_text()
    p = _Collect()
    p.feed(text)
    # 5 figures: issue 13 added the contact matrices of the default views; each an SVG image (issue 15:
    # written directly, no plotting library) that decodes to an <svg> element with a size
    import base64

    assert len(p.imgs) == 5 and all(src.startswith("data:image/svg+xml;base64,") for src in p.imgs)
    for src in p.imgs:
        svg_text = base64.b64decode(src.split(",", 1)[1]).decode("utf-8")
        assert re.match(r'<svg xmlns="http://www.w3.org/2000/svg" width="\d+" height="\d+"', svg_text)
        assert svg_text.endswith("</svg>")
    assert p.links == []  # nothing loaded from outside the file
    assert not re.search(r"""(src|href)=["']https?:""", text)
    assert sorted(p.marks) == ["mark bottom", "mark top"]  # fixed header and footer: on every printed page
    assert "position: fixed" in text and "@media print" in text
    assert text.count("CONFIDENTIAL") >= 3
    assert CAUTIONS.split(".")[0] in text
    assert "data-protection officer" in text and "ethics board" in text


def _true_figures(audit):
    """Strings of the report's true (unprotected) figures, in the forms a leak would take."""
    values = [audit["network"]["contacts"], audit["degree_distribution"]["true_mean_degree"]]
    for k in ("ks", "wasserstein1", "l1"):
        values.append(audit["degree_distribution"][k])
        values.append(audit["degree_distribution"]["grouping_loss"][k])
    values += [v for k, v in audit["structure"]["true"].items() if k not in ("people",)]
    values += [w["mean_absolute_error"] for w in audit["queries"].values()]
    values += [w["true_total"] for k, w in audit["queries"].items() if "true_total" in w]
    out = set()
    for v in values:
        if isinstance(v, int):
            out |= {str(v), f"{v:,}"}
        else:
            out |= {repr(v), f"{v:.6g}", f"{v:.5f}"}
    return {s for s in out if len(s.replace(",", "").replace(".", "").lstrip("0")) >= 4}


def test_no_true_statistic_leaks_into_the_bundle(released):
    _, out, report = released
    audit = json.loads((report / AUDIT_JSON).read_text())
    figures = _true_figures(audit)
    assert len(figures) > 20
    public = (out / "manifest.json").read_text() + (out / "README.md").read_text()
    for f in out.glob("*.parquet"):
        md = pq.read_schema(f).metadata or {}
        public += " ".join(v.decode("utf-8", "replace") for v in md.values())
    leaked = sorted(s for s in figures if s in public)
    assert leaked == [], f"true figures found in the public bundle: {leaked}"
    # and the true figures really are in the report (the check above looks for the right strings)
    report_json = (report / AUDIT_JSON).read_text()
    assert str(audit["network"]["contacts"]) in report_json
    assert main(["check", str(out)]) == 0


def test_report_inside_the_bundle_or_existing_is_refused(released, tmp_path, capsys):
    town, _, _ = released
    out = tmp_path / "b"
    args = ["release", "--policy", str(town["policy"]), "--edges", str(town["edges"]), "--nodes",
            str(town["people"]), "--out", str(out), "--quiet"]
    assert main(args + ["--report", str(out / "report")]) == 7
    assert "must not be written inside the public bundle" in capsys.readouterr().err
    assert not out.exists()
    (tmp_path / "b.report").mkdir()
    (tmp_path / "b.report" / "notes.txt").write_text("someone else's")
    assert main(args) == 7  # refused before any work: the folder exists
    assert not out.exists()
    assert main(args + ["--overwrite"]) == 7  # not a report folder: never replaced
    assert (tmp_path / "b.report" / "notes.txt").exists()


def test_demo_prints_where_the_report_went(tmp_path, capsys):
    out, rep = tmp_path / "demo", tmp_path / "board"
    assert main(["demo", "--out", str(out), "--people", "1200", "--report", str(rep), "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert f"CONFIDENTIAL audit report (board only, not for researchers): {rep}" in printed
    assert (rep / REPORT_HTML).exists() and (out / "manifest.json").exists()


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def test_report_opens_in_headless_chromium_and_its_images_load(released):
    browser = _chromium()
    if browser is None:
        if os.environ.get("AGGPUB_CI"):
            pytest.fail("chromium is not installed but AGGPUB_CI is set: the browser test must run in CI")
        pytest.skip("chromium not installed (install Debian's chromium to run this test)")
    _, _, report = released
    url = (report / REPORT_HTML).absolute().as_uri()
    with tempfile.TemporaryDirectory() as profile:
        res = subprocess.run(
            [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             f"--user-data-dir={profile}", "--virtual-time-budget=10000", "--dump-dom", url],
            capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr[-2000:]
    dom = res.stdout
    m = re.search(r'id="image-check"[^>]*data-images="(\d+)"[^>]*data-images-loaded="(\d+)"', dom)
    assert m, "the report's image check did not run in the browser"
    total, loaded = int(m.group(1)), int(m.group(2))
    assert total == 5 and loaded == total  # issue 13: the views' figure is the fifth
    assert dom.count('data-loaded="yes"') == 5 and 'data-loaded="no"' not in dom
    assert "CONFIDENTIAL" in dom


def test_write_report_is_atomic_and_removes_abandoned_temporaries(tmp_path):
    from aggpub.audit import write_report

    audit = {"network": {"people": 10, "contacts": 12}, "settings": {"sanity_bound": 1.0,
             "sanity_bound_rule": "given"}, "created_utc": "now", "title": "t"}
    stale = tmp_path / ".rep.tmp-0badf00d"
    stale.mkdir()
    (stale / AUDIT_JSON).write_text("{}")
    foreign = tmp_path / ".rep.tmp-someone"
    foreign.mkdir()
    (foreign / "other.txt").write_text("x")
    path = write_report(tmp_path / "rep", audit)
    assert sorted(p.name for p in tmp_path.iterdir()) == [".rep.tmp-someone", "rep"]
    assert json.loads((path / AUDIT_JSON).read_text())["network"]["contacts"] == 12
    audit["network"]["contacts"] = 13
    with pytest.raises(Exception, match="already exists"):
        write_report(path, audit)
    write_report(path, audit, overwrite=True)
    assert json.loads((path / AUDIT_JSON).read_text())["network"]["contacts"] == 13
    assert sorted(p.name for p in tmp_path.iterdir()) == [".rep.tmp-someone", "rep"]
