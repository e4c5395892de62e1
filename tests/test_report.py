"""Tests of the HTML report (audit.report): self-contained, escaped, fast, and rendered by a real browser."""

from __future__ import annotations

import argparse
import base64
import io
import re
import shutil
import subprocess
import time
from pathlib import Path

import pytest

from audit.report import cmd_report, write_report
from audit.store import ResultsStore
from schemas.summary import summary_validators

EVIL_STUDY = "<script>alert('study')</script> Study & \"Co\""
EVIL_CASE = "<img src=x onerror=alert(1)>"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from audit.config import AuditConfig
    from audit.demo import write_demo_review
    from audit.diagnose import diagnose_cases
    from audit.intake import load_review

    folder = tmp_path_factory.mktemp("demo")
    review = write_demo_review(folder)
    prep = load_review([review.data_folder], AuditConfig()).prepared
    # one study id and one case id that would run as HTML if they were not escaped
    first = sorted(prep.observations["study"].unique())[0]
    obs = prep.observations.astype({"study": "str", "case": "str"})  # (categoricals take no new labels)
    obs["study"] = obs["study"].replace({first: EVIL_STUDY})
    key = obs.loc[obs["study"] == EVIL_STUDY, "case_key"].iloc[0]
    obs.loc[obs["case_key"] == key, "case"] = EVIL_CASE
    quarantine = prep.quarantine.copy()
    quarantine["message"] = quarantine["message"].astype(str) + " <b>bold?</b>"
    cases = diagnose_cases(obs)["cases"]
    return {"obs": obs, "cases": cases, "quarantine": quarantine, "adjustments": prep.adjustments}


def _write_store(path: Path, demo, *, with_summary: bool, with_observations: bool = True) -> Path:
    from audit.summary import summarize

    store = ResultsStore(path, validators=summary_validators())
    with store.begin_run({"alpha": 0.05, "note": "<i>param</i>"}, "test-version", {"a.csv": "0" * 64}) as run:
        run.write_table("cases", demo["cases"])
        if with_observations:
            run.write_table("observations", demo["obs"])
        run.write_table("quarantine", demo["quarantine"])
        run.write_table("adjustments", demo["adjustments"])
        if with_summary:
            tables = summarize(demo["cases"], 0.05, quarantine=demo["quarantine"],
                               observations=demo["obs"] if with_observations else None)
            tables["summary_overall"] = tables["summary_overall"].assign(answer="STORED ANSWER <u>x</u>")
            for name, df in tables.items():
                run.write_table(name, df)
        run.commit({"cases_audited": len(demo["cases"])})
    return path


@pytest.fixture(scope="module")
def report(tmp_path_factory, demo):
    root = tmp_path_factory.mktemp("report")
    store = _write_store(root / "store", demo, with_summary=False)
    start = time.perf_counter()
    path = write_report(store, root / "out" / "report.html")
    seconds = time.perf_counter() - start
    return {"path": path, "html": path.read_text(encoding="utf-8"), "seconds": seconds, "root": root}


def test_report_is_self_contained_escaped_fast_and_modest(report):
    html = report["html"]
    assert html.startswith("<!DOCTYPE html>")
    # escaping: data never becomes markup
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(&#x27;study&#x27;)&lt;/script&gt; Study &amp; &quot;Co&quot;" in html
    assert "<img src=x" not in html and "&lt;img src=x onerror=alert(1)&gt;" in html
    assert "<b>bold?</b>" not in html and "&lt;b&gt;bold?&lt;/b&gt;" in html
    assert "<i>param</i>" not in html
    # self-contained: nothing to fetch, no scripts
    assert not re.search(r"""(src|href)\s*=\s*['"]?(https?:|//)""", html, re.I)
    assert "<link" not in html.lower() and "@import" not in html and "url(" not in html
    images = re.findall(r"<img src='([^']*)'", html)
    assert len(images) >= 4 and all(src.startswith("data:image/png;base64,") for src in images)
    for src in images:  # each embedded figure is a real PNG
        assert base64.b64decode(src.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    # content: every section, the cautions and references
    for needle in ("Serial dependence across the review", "How often would serial dependence change conclusions",
                   "Screening table", "Cases whose decision changes", "Case graphs by study", "Quarantine",
                   "Adjustments", "Run parameters", "Methods and references", "never replace",
                   "professional judgment", "review protocol", "DerSimonian", "Wilson"):
        assert needle in html, needle
    assert html.count("<svg") >= 50  # one inline graph per case (52 in the demo) plus the legend
    assert report["path"].stat().st_size < 3_000_000


def test_large_reviews_get_capped_graphs_forest_and_tables(tmp_path, demo, monkeypatch):
    import audit.report as report_module

    monkeypatch.setattr(report_module, "MAX_CASE_GRAPHS", 10)
    monkeypatch.setattr(report_module, "MAX_FOREST_STUDIES", 3)
    monkeypatch.setattr(report_module, "MAX_TABLE_ROWS", 2)
    store = _write_store(tmp_path / "store", demo, with_summary=False)
    html = write_report(store, tmp_path / "r.html").read_text(encoding="utf-8")
    assert html.count("<svg") == 10 + 1  # ten graphs and the legend
    assert f"This review has {len(demo['cases'])} cases; graphs are drawn for 10 of them" in html
    assert "Shown: the 3 studies with most cases, of" in html
    assert "Showing 2 of" in html  # long tables say how much they show
    drawn, _ = report_module._cases_to_draw(demo["cases"], None)
    flipped = demo["cases"][["flip_gls_reml", "flip_hac", "flip_tau"]].astype("boolean").fillna(False).any(axis=1)
    n_flip = int(flipped.sum())
    assert n_flip > 0
    # flagged cases come first: as many of the drawn ones flip as there are flips (up to the cap)
    drawn_flip = flipped[drawn.index].sum()
    assert drawn_flip == min(n_flip, 10)


def test_report_uses_stored_summary_and_works_without_observations(tmp_path, demo):
    store = _write_store(tmp_path / "store", demo, with_summary=True, with_observations=False)
    path = write_report(store)  # default location: inside the store folder
    assert path.parent == store and path.suffix == ".html"
    html = path.read_text(encoding="utf-8")
    assert "STORED ANSWER &lt;u&gt;x&lt;/u&gt;" in html  # read from the store, escaped
    assert "case graphs are not available" in html


def test_cmd_report(tmp_path, demo, capsys):
    store = _write_store(tmp_path / "store", demo, with_summary=False)
    out = tmp_path / "r.html"
    assert cmd_report(argparse.Namespace(store=str(store), out=str(out), run="latest")) == 0
    assert out.exists() and str(out) in capsys.readouterr().out
    assert cmd_report(argparse.Namespace(store=str(tmp_path / "empty"), out=None, run="latest")) == 2


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


@pytest.mark.integration
def test_report_renders_in_headless_chromium(report, tmp_path):
    browser = _chromium()
    if browser is None:
        pytest.skip("Debian's chromium is not installed (apt-get install -y chromium); cannot render the report")
    from PIL import Image

    shot = tmp_path / "shot.png"
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,3000",
           report["path"].resolve().as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    assert shot.exists(), proc.stderr[-2000:]
    img = Image.open(io.BytesIO(shot.read_bytes())).convert("RGB")
    assert img.size == (1200, 3000)
    colours = img.getcolors(maxcolors=1 << 20)
    assert colours is not None and len(colours) > 200  # text, tables and figures, not a blank page
    most = max(count for count, _ in colours)
    assert most / (img.size[0] * img.size[1]) < 0.95
    top = img.crop((0, 0, 1200, 600)).getcolors(maxcolors=1 << 20)
    assert top is not None and len(top) > 20  # the heading and the answer box are drawn
