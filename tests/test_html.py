"""The HTML report (audit/html.py): content, escaping, self-containment, large portfolios, and
behaviour in a real headless browser (Chromium from the system packages; skipped without one).
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pandas as pd
import pytest

import audit
from audit.cli import main
from audit.html import MAX_CURVES, STUDY_METRICS, render_html, write_html
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"
HOSTILE_ID = "<script>alert('id')</script>"
HOSTILE_FAMILY = "<script>alert('family')</script>"
HOSTILE_TITLE = '"><img src=x onerror="alert(1)"><b>bold</b>'


@pytest.fixture(scope="module")
def demo() -> audit.AuditResult:
    return audit.audit_file(DEMO, group_by=["field"])


@pytest.fixture(scope="module")
def page(demo) -> str:
    return render_html(demo)


class _Elements(HTMLParser):
    """Tags with their attributes, in document order (the standard library's parser)."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def _parse(text: str) -> _Elements:
    parser = _Elements()
    parser.feed(text)
    return parser


# -- content --------------------------------------------------------------------------------------


def test_every_study_has_a_table_row_and_a_section(demo, page):
    tags = _parse(page).tags
    sections = [a["id"] for t, a in tags if t == "section" and a.get("class") == "study"]
    assert sections == [f"study-{i}" for i in range(len(demo.table))]
    links = [a["href"] for t, a in tags if t == "a" and (a.get("href") or "").startswith("#study-")]
    assert sorted(set(links)) == sorted(f"#{s}" for s in sections)
    text = html.unescape(page)
    for sid in demo.table["study_id"]:
        assert f">{sid}</a>" in text


def test_portfolio_numbers_are_the_portfolio_blocks(demo, page):
    p = demo.portfolio
    q1, med, q3 = p["power_distribution"]["quartiles"]
    assert f"Median <strong>{med:.2f}</strong>" in page
    assert f"{q1:.2f} – {q3:.2f}" in page
    at, known = p["power_distribution"]["at_target"], p["power_distribution"]["studies"]
    assert f"{at} of {known}" in page
    for rule, count in p["flag_counts"].items():
        assert f'href="#rule-{rule}"' in page and f'id="rule-{rule}"' in page
        assert count > 0


def test_groups_section_shows_each_value(demo, page):
    block = page[page.index('id="groups"') : page.index('id="figures"')]
    for value, g in demo.groups["field"].items():
        assert f'<td>{html.escape(value)}</td><td class="num">{g["studies"]}</td>' in block


def test_study_section_has_plan_versus_reality_curve_findings_and_rationale(demo, page):
    pos = demo.positions_of("KF-101")[0]
    start = page.index(f'id="study-{pos}"')
    section = page[start : page.index("</section>", start)]
    assert "Planned versus realized" in section and "<polyline" in section
    assert "size, group 1" in section
    rules = {r.id: r for r in demo.rules}
    for rule_id in demo.findings.loc[demo.findings["pos"] == pos, "rule"]:
        assert f"<strong>{rule_id}</strong>" in section
        rationale = " ".join(rules[rule_id].rationale.split())
        assert rationale[:80] in html.unescape(section)


def test_cautions_and_no_observed_power_as_evidence(page):
    assert "supports, and does not replace, the judgment of a qualified statistician" in page
    assert "observed_power" not in STUDY_METRICS
    metric_rows = re.findall(r'<a href="#m-([a-z_0-9]+)">', page)
    assert metric_rows and "observed_power" not in metric_rows
    assert 'id="reading"' in page and "@media print" in page


def test_invalid_rows_say_why(demo, page):
    bad = [i for i in range(len(demo.table)) if not demo.valid[i]]
    assert bad
    errors = demo.error_texts()
    for pos in bad:
        start = page.index(f'id="study-{pos}"')
        section = page[start : page.index("</section>", start)]
        assert "Why this row was not audited" in section
        assert errors[pos][0] in html.unescape(section)


# -- escaping and self-containment -----------------------------------------------------------------


def _hostile() -> audit.AuditResult:
    frame = pd.read_csv(DEMO, dtype=str, keep_default_na=False)
    frame = frame[frame["outcome_family"].isin(["alertness", "activity", "attention"])]
    frame = frame.reset_index(drop=True)
    frame.loc[0, "study_id"] = HOSTILE_ID
    frame.loc[0, "title"] = HOSTILE_TITLE
    frame["programme"] = ["<i>p</i>", "&amp;"] * (len(frame) // 2) + ["x"] * (len(frame) % 2)
    # A family name reaches the family figure's title, drawn by matplotlib into the SVG.
    frame.loc[frame["outcome_family"] == "alertness", "outcome_family"] = HOSTILE_FAMILY
    return audit.audit_table(frame, group_by=["programme"])


def test_hostile_ids_titles_and_group_values_are_escaped():
    page = render_html(_hostile())
    tags = _parse(page).tags
    assert [t for t, _ in tags].count("script") == 1  # ours only
    assert not any(t in ("img", "b", "i") for t, _ in tags)
    assert not any(k.startswith("on") for _, a in tags for k in a)
    assert "&lt;script&gt;alert(" in page
    assert "&lt;i&gt;p&lt;/i&gt;" in page and "&amp;amp;" in page
    # The study's figure title (matplotlib) is not drawn from the title; the curve is ours.
    assert HOSTILE_TITLE not in page and HOSTILE_ID not in page and HOSTILE_FAMILY not in page
    assert 'id="figure-family-' in page  # the hostile family's figure is drawn, escaped


def test_no_external_resources_and_the_script_is_allowed_by_its_hash(page):
    tags = _parse(page).tags
    csp = next(a["content"] for t, a in tags if t == "meta" and a.get("http-equiv"))
    assert "default-src 'none'" in csp
    assert not [t for t, _ in tags if t in ("link", "iframe", "object", "embed", "img")]
    for t, a in tags:
        for key in ("src", "href", "xlink:href", "action"):
            value = a.get(key) or ""
            assert not value or value.startswith("#"), (t, key, value)
    assert not re.search(r"url\(\s*['\"]?(?!#)", page) and "@import" not in page
    script = re.search(r"<script>(.*?)</script>", page, re.S).group(1)
    digest = base64.b64encode(hashlib.sha256(script.encode()).digest()).decode()
    assert f"'sha256-{digest}'" in csp


def test_large_portfolio_limits_curves_and_says_so(demo):
    frame = pd.read_csv(DEMO, dtype=str, keep_default_na=False)
    big = pd.concat([frame] * 40, ignore_index=True)  # 2,600 studies
    big["study_id"] = [f"B-{i:05d}" for i in range(len(big))]
    big = big.drop(columns=["outcome_family"])
    result = audit.audit_table(big)
    page = render_html(result)
    assert page.count('<section class="study"') == len(big)
    assert page.count("<polyline") <= 2 * MAX_CURVES
    assert f"at most {MAX_CURVES}, those with the most serious findings first" in page
    assert "links to its rule's rationale" in page
    assert len(page) < 40_000_000


def _small_csv(tmp_path: Path) -> Path:
    path = tmp_path / "small.csv"
    pd.read_csv(DEMO, dtype=str, keep_default_na=False).head(10).to_csv(path, index=False)
    return path


def test_written_atomically_and_never_over_the_input(tmp_path):
    small = _small_csv(tmp_path)
    out = tmp_path / "r.html"
    write_html(audit.audit_file(small), out)
    assert out.read_text("utf-8").startswith("<!DOCTYPE html>")
    assert not list(tmp_path.glob(".*.tmp"))
    before = small.read_bytes()
    assert main(["check", str(small), "--html", str(small), "--quiet"]) == 2
    assert small.read_bytes() == before


def test_cli_html_with_group_by(tmp_path):
    out = tmp_path / "r.html"
    small = _small_csv(tmp_path)
    assert main(["check", str(small), "--html", str(out), "--group-by", "design", "--quiet"]) == 0
    text = out.read_text("utf-8")
    assert "By design" in text and 'id="studies-table"' in text
    assert text.count('<section class="study"') == 10


# -- in a real browser -----------------------------------------------------------------------------

_BROWSERS = ("chromium", "chromium-browser")
_BROWSER = next((shutil.which(b) for b in _BROWSERS if shutil.which(b)), None)
needs_browser = pytest.mark.skipif(
    _BROWSER is None,
    reason="no headless browser: install Chromium (Debian: apt-get install chromium) to run the "
    "HTML report's browser tests",
)

# Test instrumentation added to the page (allowed by its own hash in the page's policy):
# ``_WATCH`` in <head> records policy violations from the start; ``_DRIVE`` at the end filters
# and sorts the studies table as a user would and writes what it saw into the DOM.
_WATCH = (
    "window.__violations = [];"
    "document.addEventListener('securitypolicyviolation', function (e) {"
    " window.__violations.push(e.violatedDirective + ' ' + e.blockedURI); });"
)
_DRIVE = """
(function () {
  var out = {};
  var table = document.getElementById("studies-table");
  var rows = function () { return Array.prototype.slice.call(table.tBodies[0].rows); };
  var visible = function () { return rows().filter(function (r) { return !r.hidden; }); };
  var ids = function () { return visible().map(function (r) { return r.cells[1].textContent; }); };
  out.controls_shown = !document.getElementById("studies-controls").hidden;
  out.initial_count = document.getElementById("studies-shown").textContent;
  var search = document.getElementById("studies-filter");
  search.value = "KF-10";
  search.dispatchEvent(new Event("input"));
  out.filtered_ids = ids();
  out.filtered_count = document.getElementById("studies-shown").textContent;
  search.value = "";
  search.dispatchEvent(new Event("input"));
  var severity = document.getElementById("studies-severity");
  severity.value = "serious";
  severity.dispatchEvent(new Event("change"));
  out.serious_ids = ids();
  severity.value = "";
  severity.dispatchEvent(new Event("change"));
  var power = table.tHead.rows[0].cells[6];
  power.querySelector("button").click();
  out.ascending = rows().map(function (r) { return r.cells[6].getAttribute("data-sort"); });
  out.sort_state = power.getAttribute("aria-sort");
  power.querySelector("button").click();
  out.descending = rows().map(function (r) { return r.cells[6].getAttribute("data-sort"); });
  var study = table.tHead.rows[0].cells[1];
  study.querySelector("button").click();
  out.by_id = rows().map(function (r) { return r.cells[1].textContent; });
  out.resources = performance.getEntriesByType("resource").map(function (e) { return e.name; });
  out.violations = window.__violations;
  out.svg_count = document.querySelectorAll("svg").length;
  out.sections = document.querySelectorAll("section.study").length;
  var pre = document.createElement("pre");
  pre.id = "test-results";
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
})();
"""


def _sha(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode()).digest()).decode() + "'"


def _instrumented(page: str) -> str:
    page = page.replace("script-src ", f"script-src {_sha(_WATCH)} {_sha(_DRIVE)} ", 1)
    page = page.replace("<style>", f"<script>{_WATCH}</script>\n<style>", 1)
    return page.replace("</body>", f"<script>{_DRIVE}</script>\n</body>", 1)


def _chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [
            _BROWSER,
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--no-first-run",
            "--disable-extensions",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            # Any request the page made would go through a proxy that is not there and fail.
            "--proxy-server=127.0.0.1:9",
            f"--user-data-dir={tmp_path / 'profile'}",
            *args,
        ],
        capture_output=True,
        text=True,
        timeout=180,
        check=False,
    )


@needs_browser
def test_in_a_browser_the_table_sorts_and_filters_and_nothing_is_fetched(demo, page, tmp_path):
    path = tmp_path / "report.html"
    path.write_text(_instrumented(page), "utf-8")
    done = _chromium(tmp_path, "--virtual-time-budget=10000", "--dump-dom", path.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'<pre id="test-results">(.*?)</pre>', done.stdout, re.S)
    assert found, "the page's script did not run (blocked by the policy?)"
    seen = json.loads(html.unescape(found.group(1)))
    n = len(demo.table)
    ids = [str(v) for v in demo.table["study_id"]]
    assert seen["controls_shown"] and seen["initial_count"] == f"{n} of {n} studies shown"
    want = [i for i in ids if "kf-10" in i.lower()]
    assert (
        seen["filtered_ids"] == want
        and seen["filtered_count"] == f"{len(want)} of {n} studies shown"
    )
    worst = demo.findings.groupby("pos")["severity"].agg(set)
    serious = [ids[p] for p in range(n) if "serious" in worst.get(p, set())]
    assert seen["serious_ids"] == serious and serious
    known = [float(v) for v in seen["ascending"] if v != ""]
    assert known == sorted(known) and seen["sort_state"] == "ascending"
    assert all(v == "" for v in seen["ascending"][len(known) :])  # unknown powers last
    down = [float(v) for v in seen["descending"] if v != ""]
    assert down == sorted(known, reverse=True)
    assert seen["by_id"] == sorted(ids, key=str.lower)
    assert seen["resources"] == [] and seen["violations"] == []
    assert seen["sections"] == n and seen["svg_count"] >= 1


@needs_browser
def test_in_a_browser_it_prints_to_pdf(page, tmp_path):
    path = tmp_path / "report.html"
    path.write_text(page, "utf-8")
    pdf = tmp_path / "report.pdf"
    done = _chromium(tmp_path, "--no-pdf-header-footer", f"--print-to-pdf={pdf}", path.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    data = pdf.read_bytes()
    assert data.startswith(b"%PDF") and len(data) > 50_000
    # One page per study section at least (the print style sheet starts each on a new page).
    pages = len(re.findall(rb"/Type\s*/Page[^s]", data))
    assert pages > 60
