"""The HTML campaign report: parses, is self-contained, shows every specimen and plot, escapes user text."""

from __future__ import annotations

import base64
import json
from html.parser import HTMLParser

import pytest
from click.testing import CliRunner

from coupon.campaign.criteria import load_criteria
from coupon.campaign.store import open_store
from coupon.campaign.timeline import analyse_campaign
from coupon.cli.main import cli
from coupon.report.campaign_content import plot_plan
from coupon.report.html_report import build_html

try:
    from campaign_rows import build_campaign, layout_specimens
except ImportError:  # tests collected as a package
    from tests.campaign_rows import build_campaign, layout_specimens

EVIL = "<script>alert(1)</script>"
VOID = {"meta", "img", "br", "hr", "link", "input", "col", "area", "base", "source", "wbr"}


class Collector(HTMLParser):
    """Tags, attributes and text; checks that elements nest properly."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.tags, self.text, self.errors = [], [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    root = tmp_path_factory.mktemp("campaign")
    build_campaign(root, bad_id=EVIL)
    with open_store(root / "coupon.db") as store:
        a = analyse_campaign(store, load_criteria(None))
    return root, a


def parse(text):
    p = Collector()
    p.feed(text)
    p.close()
    return p


def test_html_parses_and_is_self_contained(campaign):
    root, a = campaign
    text = build_html(a, db_path=root / "coupon.db", bases=[root])
    p = parse(text)
    assert p.errors == [] and p.stack == []
    assert p.tags[0][0] == "html"
    tags = {t for t, _ in p.tags}
    assert "script" not in tags and "link" not in tags and "iframe" not in tags
    for _, attrs in p.tags:
        for k in ("src", "href"):
            assert not str(attrs.get(k, "data:")).startswith(("http", "//", "file:")), attrs
    imgs = [attrs["src"] for t, attrs in p.tags if t == "img"]
    assert imgs and all(s.startswith("data:image/") for s in imgs)


def test_html_contains_every_specimen_plot_and_overlay(campaign):
    root, a = campaign
    p = parse(build_html(a, db_path=root / "coupon.db", bases=[root]))
    body = "".join(p.text)
    for s in layout_specimens(bad_id=EVIL):
        assert s["specimen_id"] in body
    figures = {attrs.get("id"): i for i, (t, attrs) in enumerate(p.tags) if t == "figure" and attrs.get("id")}
    plans = plot_plan(a)
    # 5 ratings, time to failure, droplet zones + kymograph, coupons, 2 pit histograms
    assert len(plans) == 11
    for spec in plans:
        i = figures[spec.fig_id]
        tag, attrs = p.tags[i + 1]
        assert tag == "img" and attrs["src"].startswith("data:image/png;base64,")
        assert base64.b64decode(attrs["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    jpegs = [attrs["src"] for t, attrs in p.tags if t == "img" and attrs["src"].startswith("data:image/jpeg")]
    assert len(jpegs) == 45  # one overlay per panel per inspection (9 x 5); pit overlays are missing on purpose
    assert base64.b64decode(jpegs[0].split(",", 1)[1])[:3] == b"\xff\xd8\xff"
    assert body.count("picture not found") == 2  # the two coupons without an overlay file
    for needle in ("do not replace, a qualified", "Salt-spray", "Chemicals", "coupon 0.1.0",
                   "not reached by 720 h", "failed between"):
        assert needle in body


def test_user_text_is_escaped(campaign):
    root, a = campaign
    text = build_html(a, title="Run <b>1</b> & co", db_path=root / "coupon.db", bases=[root])
    assert "<script" not in text.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "Run &lt;b&gt;1&lt;/b&gt; &amp; co" in text
    assert EVIL in "".join(parse(text).text)  # shown as text, not run


@pytest.mark.slow
def test_report_command_writes_html_and_pdf(tmp_path):
    build_campaign(tmp_path)
    prof = tmp_path / "profile.json"
    prof.write_text(json.dumps({"schema": "coupon-profile", "schema_version": 1, "scale": {
        "px_per_mm": 10.02, "uncertainty_px_per_mm": 0.01, "method": "checkerboard", "reprojection_error_mm": 0.03},
        "colour": None, "indicator": None, "history": [{"step": "scale", "date": "2026-01-01",
                                                          "residuals": {"rms_mm": 0.031}}]}))
    r = CliRunner().invoke(cli, ["report", str(tmp_path), "--pdf", str(tmp_path / "r.pdf"),
                                 "--fail-creep-mean-above-mm", "1.5"])
    assert r.exit_code == 0, r.output
    assert "using the built-in example criteria" in r.output
    html = (tmp_path / "report.html").read_text()
    assert "creep_mean_mm above 1.5 mm" in html and "10.02 px/mm" in html and "rms_mm = 0.031" in html
    assert (tmp_path / "r.pdf").read_bytes()[:5] == b"%PDF-"
    r = CliRunner().invoke(cli, ["report", str(tmp_path / "none")])
    assert r.exit_code == 1 and "no campaign database here" in r.output
