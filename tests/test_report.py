"""HTML report: sections, inline images, no external references, caution first, CLI, headless browser."""
import base64
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser

import pytest

from quakefolio.pipeline.caution import CAUTION
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.report import SECTIONS, build_report, output_cache, write_report
from quakefolio.pipeline.report.document import CACHED_SECTIONS
from quakefolio.pipeline.runner import run_pure
from quakefolio.pipeline.io.store import PARTIAL_PREFIX, read_table

from conftest import MINI, missing_tool

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


class _Page(HTMLParser):
    """Tags with their attributes, section ids, and the text in document order."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags = []
        self.texts = []
        self.sections = []
        self._skip = 0
        self._in_body = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "body":
            self._in_body = True
        if tag in ("script", "style"):
            self._skip += 1
        if tag == "section":
            self.sections.append(attrs.get("id"))

    def handle_endtag(self, tag):
        if tag in ("script", "style"):
            self._skip -= 1

    def handle_data(self, data):
        if self._in_body and not self._skip and data.strip():
            self.texts.append(data.strip())

    def images(self):
        return [a for t, a in self.tags if t == "img"]


def _parse(text):
    page = _Page()
    page.feed(text)
    page.close()
    return page


def _section(text, sid):
    m = re.search(rf'<section id="{sid}">(.*?)</section>', text, flags=re.S)
    assert m, f"section {sid} missing"
    return m.group(1)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Run A and run B (compute mode with the event-based stage and a conditional mean spectrum; B after an
    exposure change) and an ingest-mode run, all in one copy of the mini inputs."""
    dst = tmp_path_factory.mktemp("report") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio_compute.toml"
    text = cfg.read_text().replace("return_periods_yr = [100, 475, 2475]", "return_periods_yr = [100, 475, 2475]\n"
                                   'cms_conditioning_ims = ["SA_1.0"]\ncms_return_periods_yr = [475, 2475]')
    cfg.write_text(text + "\n[portfolio]\nyears = 2000\n")
    run_a = run_pure(cfg)
    exposure = dst / "exposure.csv"
    exposure.write_text(exposure.read_text().replace("B2,10.029,20.002,TST-A,2500000",
                                                     "B2,10.029,20.002,TST-A,3000000"))
    run_b = run_pure(cfg)
    ingest = run_pure(dst / "quakefolio.toml")
    return {"a": run_a, "b": run_b, "ingest": ingest, "output": dst / "output"}


@pytest.fixture(scope="module")
def report_b(runs):
    """Run B's change report, its unchanged sections stored in the output folder's cache (as a run does)."""
    return build_report(runs["b"], previous_run=runs["a"], cache=output_cache(runs["b"]))


@pytest.fixture(scope="module")
def report_ingest(runs):
    return build_report(runs["ingest"], cache=output_cache(runs["ingest"]))


def test_every_section_is_present_once_in_order(report_b, report_ingest):
    for text in (report_b, report_ingest):
        page = _parse(text)
        assert page.sections == [sid for sid, _ in SECTIONS]
        for sid, title in SECTIONS:
            assert re.search(rf'<section id="{sid}"><h2>', text)
        assert "could not be drawn" not in text  # no section fell back to its error note


def test_caution_opens_the_report(report_b, report_ingest):
    for text in (report_b, report_ingest):
        page = _parse(text)
        assert page.texts[0] == CAUTION
        assert text.index(CAUTION) < text.index("<h1>")


def test_every_image_is_an_inline_png(report_b, report_ingest):
    for text, at_least in ((report_b, 6), (report_ingest, 4)):
        images = _parse(text).images()
        assert len(images) >= at_least
        for img in images:
            src = img["src"]
            assert src.startswith("data:image/png;base64,")
            data = base64.b64decode(src.split(",", 1)[1], validate=True)
            assert data.startswith(PNG_SIGNATURE) and len(data) > 1000
            assert img.get("alt")


def test_no_external_resources(report_b, report_ingest):
    for text in (report_b, report_ingest):
        for tag, attrs in _parse(text).tags:
            for key in ("src", "href", "action", "data", "poster", "srcset"):
                value = (attrs.get(key) or "").strip().lower()
                assert not value.startswith(("http://", "https://", "//", "ftp:")), (tag, key, value[:80])
            if tag == "script":
                assert "src" not in attrs
            assert tag != "link"
        assert not re.search(r"url\(\s*['\"]?(https?:)?//", text, flags=re.I)
        assert "@import" not in text and "@font-face" not in text


def test_event_based_sections_hold_results(runs, report_b):
    portfolio = _section(report_b, "portfolio")
    assert "Average annual loss" in portfolio and "TVaR" in portfolio and "<img" in portfolio
    hazard = _section(report_b, "hazard")
    assert hazard.count("<img") == 4  # curves, uniform-hazard spectra, conditional mean spectra, disaggregation
    assert 'alt="conditional mean spectra"' in hazard and "scenario epsilon" in hazard
    assert "not for design use" in hazard
    checks = _section(report_b, "checks")
    assert "portfolio AAL vs classical EAL" in checks and "Hazard logic tree" in checks
    # thousands separators and the run's currency
    value = read_table(runs["b"], "asset_loss").set_index("asset_id").replacement_value["B1"]
    assert f"{value:,.0f}" in _section(report_b, "riskiest") and "USD" in report_b


def test_sortable_asset_table_lists_every_state(runs, report_b):
    damage = _section(report_b, "damage")
    assert 'class="sortable' in damage
    states = set(read_table(runs["b"], "asset_damage").damage_state)
    for state in states:
        assert state in damage
    for asset in read_table(runs["b"], "asset_loss").asset_id:
        assert f"<td>{asset}</td>" in damage


def test_change_report_names_assets_and_causes(report_b):
    changes = _section(report_b, "changes")
    assert "No change report" not in changes and "No previous run" not in changes
    assert "B2" in changes and "exposure" in changes
    assert "EAL, classical" in changes


def test_ingest_run_has_notes_instead_of_event_and_disaggregation(report_ingest):
    assert "No disaggregation in this run" in _section(report_ingest, "hazard")
    assert "Conditional mean spectrum" not in _section(report_ingest, "hazard")
    assert "No event-based tables in this run" in _section(report_ingest, "portfolio")
    assert "No cross-checks" in _section(report_ingest, "checks")
    assert "No previous run was given" in _section(report_ingest, "changes")
    assert "<img" not in _section(report_ingest, "portfolio")


def test_hazard_stage_only_run(runs, tmp_path):
    run = run_pure(runs["output"].parent / "quakefolio_compute.toml", stages_to_run="hazard")
    text = build_report(run)
    assert _parse(text).sections == [sid for sid, _ in SECTIONS]
    assert "could not be drawn" not in text
    for sid in ("damage", "riskiest", "map"):
        assert "hazard stage only" in _section(text, sid)
    assert "<img" in _section(text, "hazard") and "<img" in _section(text, "fragility")


def test_report_of_a_partial_run_folder(runs, tmp_path):
    # The store writes report.html into the partial folder before renaming it into place.
    partial = tmp_path / f"{PARTIAL_PREFIX}{runs['b'].name}"
    shutil.copytree(runs["b"], partial)
    assert output_cache(partial) is None  # not in runs/: the store hands the run's cache over, as here
    out = write_report(partial, partial / "report.html", previous_run=runs["a"], cache=output_cache(runs["b"]))
    text = out.read_text(encoding="utf-8")
    assert _parse(text).sections == [sid for sid, _ in SECTIONS]
    assert "No change report" not in _section(text, "changes")  # compared although the folder is partial
    assert [p.name for p in partial.iterdir() if p.name.startswith(".")] == []  # no temporary file left


def test_cli_writes_report_outside_the_run(runs, capsys):
    latest = (runs["output"] / "LATEST").read_text().strip()
    run = runs["output"] / "runs" / latest
    before = sorted((p.name, p.stat().st_mtime_ns) for p in run.iterdir())
    assert main(["report", str(runs["output"])]) == 0  # the output folder stands for its LATEST run
    out = runs["output"] / "reports" / f"{latest}.html"
    assert capsys.readouterr().out.strip() == str(out)
    assert out.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    assert sorted((p.name, p.stat().st_mtime_ns) for p in run.iterdir()) == before  # runs are never modified


def test_cli_out_and_previous(runs, tmp_path, capsys):
    target = tmp_path / "change.html"
    assert main(["report", str(runs["b"]), "--previous", str(runs["a"]), "--out", str(target)]) == 0
    assert capsys.readouterr().out.strip() == str(target)
    assert "B2" in _section(target.read_text(encoding="utf-8"), "changes")


def test_cli_report_takes_unchanged_sections_from_the_output_folders_cache(runs, report_b, tmp_path, capsys):
    """``quakefolio report`` of a run whose output folder keeps a cache draws only what changed: the same
    document as one drawn in full (``report_b`` stored the sections)."""
    cache = output_cache(runs["b"])
    assert cache is not None and cache.root == runs["output"] / "cache"
    stored = sorted((cache.root / "report").rglob("*.npz"))
    assert len(stored) >= len(CACHED_SECTIONS)
    before = {p: p.stat().st_mtime_ns for p in stored}
    target = tmp_path / "again.html"
    assert main(["report", str(runs["b"]), "--previous", str(runs["a"]), "--out", str(target)]) == 0
    capsys.readouterr()
    assert target.read_text(encoding="utf-8") == report_b
    assert {p: p.stat().st_mtime_ns for p in stored} == before  # read, not drawn and written again
    assert output_cache(runs["output"]) is None  # an output folder is not a run: no cache of its own


@pytest.mark.parametrize("args", [["{missing}"], ["{run}", "--out", "{run}/report.html"],
                                  ["{run}", "--previous", "{missing}"]])
def test_cli_bad_run_exits_2_with_one_line(runs, tmp_path, capsys, args):
    argv = ["report"] + [a.format(missing=tmp_path / "nope", run=runs["b"]) for a in args]
    before = sorted((p.name, p.stat().st_mtime_ns) for p in runs["b"].iterdir())
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("error: ") and err.count("\n") == 1
    assert sorted((p.name, p.stat().st_mtime_ns) for p in runs["b"].iterdir()) == before  # run untouched


# --- headless browser --------------------------------------------------------------------------------

def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _browser(binary, tmp_path, *extra):
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    cmd = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
           "--disable-component-update", "--no-first-run", "--disable-sync", "--disable-dev-shm-usage",
           f"--user-data-dir={profile}", *extra]
    try:
        return subprocess.run(cmd, capture_output=True, text=True, timeout=180,
                              env=dict(os.environ, HOME=str(tmp_path)))
    except subprocess.TimeoutExpired:
        missing_tool("Chromium did not finish within 180 s")


def test_report_renders_in_headless_chromium(runs, report_b, tmp_path):
    binary = _chromium()
    if binary is None:
        missing_tool("no Chromium binary (chromium, chromium-browser, google-chrome) on PATH")
    # Click the EAL header of the riskiest-assets table once the page has loaded (ascending sort),
    # and record the first asset: proves the inline sorting script runs.
    probe = ("<script>(function(){var t=document.querySelector('#riskiest table.sortable');"
             "var h=Array.prototype.filter.call(t.tHead.rows[0].cells,"
             "function(c){return c.textContent.indexOf('EAL [')===0;})[0];h.click();"
             "document.body.setAttribute('data-first',t.tBodies[0].rows[0].cells[0].textContent);})();</script>")
    page = tmp_path / "report.html"
    page.write_text(report_b.replace("</body>", probe + "</body>"), encoding="utf-8")
    done = _browser(binary, tmp_path, "--dump-dom", page.as_uri())
    if done.returncode != 0 and not done.stdout.strip():
        missing_tool(f"Chromium did not run: {done.stderr.strip().splitlines()[-1:]}")
    dom = _parse(done.stdout)
    assert dom.sections == [sid for sid, _ in SECTIONS]
    images = dom.images()
    assert len(images) == len(_parse(report_b).images())
    assert all(img["src"].startswith("data:image/png;base64,") for img in images)
    loss = read_table(runs["b"], "asset_loss").sort_values(["collapse_prob_in_horizon", "asset_id"],
                                                           ascending=[False, True]).head(20)
    body = dict(next(a for t, a in dom.tags if t == "body"))
    assert body.get("data-first") == loss.sort_values("eal").asset_id.iloc[0]

    shot = tmp_path / "shot.png"
    _browser(binary, tmp_path, "--hide-scrollbars", "--window-size=1280,2400", f"--screenshot={shot}", page.as_uri())
    assert shot.is_file() and shot.read_bytes().startswith(PNG_SIGNATURE) and shot.stat().st_size > 10_000


def test_every_run_writes_its_report(tmp_path):
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    cfg = dst / "quakefolio.toml"
    cfg.write_text(cfg.read_text().replace("report = false", "report = true"))
    run = run_pure(cfg)
    html = (run / "report.html").read_text(encoding="utf-8")
    assert html.startswith("<!DOCTYPE html>") and "screening-level results" in html
