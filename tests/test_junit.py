"""JUnit XML of a batch, parsed back with xml.etree and counted.

Layout rules checked here are those of the JUnit XML format as CI servers read it (an open de-facto
standard; from memory: root <testsuites> with tests/failures/errors counts, <testsuite name tests
failures errors time>, <testcase classname name time> holding at most one <failure> or <error> with a
message attribute).
"""

from __future__ import annotations

import copy
import xml.etree.ElementTree as ET

from mpcproto import compare_with_baseline, write_junit
from test_batch_workload import batch_records


def _counts(el):
    cases = el.iter("testcase")
    n = f = e = 0
    for tc in cases:
        n += 1
        f += len(tc.findall("failure"))
        e += len(tc.findall("error"))
    return n, f, e


def test_junit_counts_one_case_per_criterion_and_errors(tmp_path):
    recs = batch_records(tmp_path, n=6, bad=(4,), tight=(1, 2))
    path = tmp_path / "ci" / "junit.xml"
    counts = write_junit(recs, path)
    root = ET.parse(path).getroot()                     # parses: well-formed XML
    assert root.tag == "testsuites"
    # 5 completed cases x 1 criterion each + 1 error case = 6 test cases
    assert _counts(root) == (6, 2, 1)
    assert (int(root.get("tests")), int(root.get("failures")), int(root.get("errors"))) == (6, 2, 1)
    assert counts == {"tests": 6, "failures": 2, "errors": 1}
    suites = root.findall("testsuite")
    assert [s.get("name") for s in suites] == ["tank-test"]
    for s in suites:
        assert _counts(s) == (int(s.get("tests")), int(s.get("failures")), int(s.get("errors")))
        assert float(s.get("time")) >= 0 and s.get("timestamp")
    for tc in root.iter("testcase"):
        assert tc.get("classname").startswith("tank-test.tank-") and tc.get("name")
        assert float(tc.get("time")) >= 0
        assert len(tc.findall("failure")) + len(tc.findall("error")) <= 1
    err = next(root.iter("error"))
    assert err.get("type") == "ValueError" and "PI gain must be positive" in err.get("message")
    fails = {tc.get("classname"): tc.find("failure") for tc in root.iter("testcase")
             if tc.find("failure") is not None}
    assert set(fails) == {"tank-test.tank-0001", "tank-test.tank-0002"}
    for f in fails.values():
        assert "limit 0.5" in f.get("message") and f.get("type") == "criterion"


def test_junit_baseline_suite_flags_regressions(tmp_path):
    recs = batch_records(tmp_path, n=3, bad=(), tight=())
    worse = copy.deepcopy(recs)
    worse[0]["controllers"]["pi"]["kpi"]["level"]["iae"] *= 1.5   # this KPI got 50 % worse
    cmp = compare_with_baseline(worse, recs, rtol=0.1)
    path = tmp_path / "j.xml"
    write_junit(worse, path, baseline=cmp)
    root = ET.parse(path).getroot()
    base = next(s for s in root.findall("testsuite") if s.get("name") == "baseline")
    # per compared case: one verdict test case and one per controller
    assert _counts(base) == (6, 1, 0)
    f = next(base.iter("failure"))
    assert "kpi.level.iae" in f.text and "+50.0 %" in f.text
    assert int(root.get("tests")) == 3 + 6 and int(root.get("failures")) == 1


def test_junit_escapes_markup_and_control_characters(tmp_path):
    rec = {"case_id": "odd<&>\"id", "scenario": "s", "status": "error",
           "message": "bad \x1b[31m <tag> & \"quote\"", "passed": False}
    path = tmp_path / "j.xml"
    write_junit([rec], path)
    root = ET.parse(path).getroot()
    err = next(root.iter("error"))
    assert "<tag> & \"quote\"" in err.get("message") and "\x1b" not in err.get("message")
