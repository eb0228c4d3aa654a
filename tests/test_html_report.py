"""The HTML report is one self-contained file: nothing loaded from outside, PNGs inline, worst first."""

from __future__ import annotations

import base64
import copy
from html.parser import HTMLParser

from mpcproto import compare_with_baseline, write_html_report
from mpcproto.report.html import SAFETY_CAUTION
from test_batch_workload import batch_records

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs: list[tuple[str, str, str]] = []
        self.tags: list[str] = []
        self.ids: set[str] = set()
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href", "srcset", "poster", "data", "action", "background"):
                self.refs.append((tag, k, v or ""))
            if k == "id":
                self.ids.add(v)

    def handle_data(self, data):
        self.text.append(data)


def test_report_is_self_contained_and_lists_worst_first(tmp_path):
    recs = batch_records(tmp_path, n=6, bad=(4,), tight=(2,))
    worse = copy.deepcopy(recs)
    for r in worse:
        if r["status"] == "ok":
            r["controllers"]["pi"]["kpi"]["level"]["iae"] *= 1.3
    cmp = compare_with_baseline(worse, recs, rtol=0.05)
    extra_png = (tmp_path / "x.png")
    from matplotlib.figure import Figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    fig = Figure(figsize=(2, 1))
    FigureCanvasAgg(fig)
    fig.add_subplot().plot([0, 1], [1, 0])
    fig.savefig(extra_png)
    out = write_html_report(worse, tmp_path / "rep" / "report.html", baseline=cmp,
                            images=[("a trajectory", extra_png)], run_info={"workers": 2})
    page = out.read_text(encoding="utf-8")
    p = _Refs()
    p.feed(page)
    # nothing outside the file: every reference is an inline data URI or an in-page anchor
    assert p.refs, "the page has images and anchors"
    for tag, attr, value in p.refs:
        assert value.startswith("data:image/png;base64,") or value.startswith("#"), (tag, attr, value)
        if value.startswith("#"):
            assert value[1:] in p.ids, f"anchor {value} has no target"
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    assert "@import" not in page and "url(" not in page and "http://" not in page \
        and "https://" not in page
    imgs = [v for t, a, v in p.refs if t == "img"]
    assert len(imgs) >= 4   # verdict chart, criterion chart, IAE chart, the extra figure
    for uri in imgs:
        assert base64.b64decode(uri.split(",", 1)[1]).startswith(PNG_SIGNATURE)
    text = " ".join(p.text)
    assert " ".join(SAFETY_CAUTION.split()) in " ".join(text.split())
    assert "licensed engineers" in text and "management of change" in text
    # worst first: the error case, then the failed one, then the passing ones
    table = page[page.index("Cases, worst first"):]
    order = [table.find(f">tank-000{k}<") for k in range(6)]
    assert all(i > 0 for i in order)
    assert order[4] < order[2] < min(order[k] for k in (0, 1, 3, 5))
    assert "worse than baseline" in text and "kpi.level.iae" in text
    assert "Not accepted" in text


def test_report_of_an_all_passing_batch_says_so(tmp_path):
    recs = batch_records(tmp_path, n=3, bad=(), tight=())
    out = write_html_report(recs, tmp_path / "report.html", charts=False)
    page = out.read_text(encoding="utf-8")
    assert "Every case completed and met its criteria" in page
    assert "<img" not in page
