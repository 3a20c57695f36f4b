"""The PDF campaign report: a PDF file with the planned number of pages."""

from __future__ import annotations

import re

import pytest

from coupon.campaign.criteria import load_criteria
from coupon.campaign.store import open_store
from coupon.campaign.timeline import analyse_campaign
from coupon.report.pdf_report import LINES_PER_PAGE, pdf_page_plan, write_pdf

try:
    from campaign_rows import build_campaign
except ImportError:  # tests collected as a package
    from tests.campaign_rows import build_campaign


def page_count(data: bytes) -> int:
    """Page objects in the file (``/Type /Page``, not ``/Pages``)."""
    return len(re.findall(rb"/Type\s*/Page(?![A-Za-z])", data))


def analysis(root, **kw):
    build_campaign(root, **kw)
    with open_store(root / "coupon.db") as store:
        return analyse_campaign(store, load_criteria(None))


@pytest.mark.slow
def test_pdf_opens_with_the_expected_pages(tmp_path):
    a = analysis(tmp_path)
    dest = write_pdf(a, tmp_path / "report.pdf", bases=[tmp_path])
    data = dest.read_bytes()
    assert data[:5] == b"%PDF-" and data.rstrip().endswith(b"%%EOF")
    # summary 1 + results 1 + 5 rating plots + time to failure 1 + droplet zones and kymograph 2
    # + coupons 1 + 2 pit histograms + 9 specimen galleries + pit overlays 1 + calibration 1 = 24
    assert page_count(data) == 24 == len(pdf_page_plan(a, bases=[tmp_path]))
    assert not list(tmp_path.glob(".report.*"))  # atomic: no temporary file left


def test_pdf_pages_follow_the_data(tmp_path):
    # panels only, no pits or droplet: summary 1 + results 1 + 5 ratings + ttf 1 + 9 galleries + calibration 1 = 18
    a = analysis(tmp_path)
    a.coupons = a.coupons.iloc[0:0]
    a.droplet = a.droplet.iloc[0:0]
    plan = pdf_page_plan(a, bases=[tmp_path])
    assert len(plan) == 24 - 2 - 1 - 2 - 1  # no droplet plots, coupon plot, pit histograms, pit overlays
    assert plan[:2] == ["summary 1", "results 1"] and plan[-1] == "calibration 1"
    # long text runs onto more pages
    a.missing = [f"X{i} has no 168 h inspection" for i in range(2 * LINES_PER_PAGE)]
    assert sum(p.startswith("results") for p in pdf_page_plan(a, bases=[tmp_path])) >= 3
