"""Signals for DVs, setpoints and limits: shapes, reproducibility, specs and their errors."""

from __future__ import annotations


import numpy as np
import pytest

import mpcproto as mp
from mpcproto.sim import RandomWalk, signal_from_spec, table_from_csv

# Reference for the shapes: their definitions in mpcproto.sim.signals (step, ramp, pulse, sine are
# the elementary test signals of process control, common practice, no source).


def test_elementary_shapes():
    t = np.array([0.0, 5.0, 10.0, 15.0, 20.0, 30.0])
    step = signal_from_spec({"kind": "step", "at": 10, "size": 2.0}, what="s")
    assert step.value(t).tolist() == [0, 0, 2, 2, 2, 2] and step.relative
    ramp = signal_from_spec({"kind": "ramp", "start": 10, "duration": 10, "size": 4.0}, what="r")
    assert np.allclose(ramp.value(t), [0, 0, 0, 2, 4, 4])
    pulse = signal_from_spec({"kind": "pulse", "at": 5, "duration": 10, "size": -1.0}, what="p")
    assert pulse.value(t).tolist() == [0, -1, -1, 0, 0, 0]
    sine = signal_from_spec({"kind": "sine", "amplitude": 3, "period": 20, "start": 10}, what="w")
    assert np.allclose(sine.value(t), [0, 0, 0, 3, 0, 0], atol=1e-12)
    const = signal_from_spec(7.5, what="c")
    assert const.value(3.0) == 7.5 and not const.relative
    absolute = signal_from_spec({"kind": "step", "at": 1, "size": 1, "base": 10}, what="a")
    assert absolute.value(0.0) == 10.0 and absolute.resolve(99.0) == 0.0
    assert isinstance(step.value(12.0), float)


def test_sum_of_signals_and_table_interpolation():
    s = signal_from_spec([{"kind": "step", "at": 0, "size": 1}, {"kind": "step", "at": 10, "size": 1}],
                         what="sum")
    assert s.value([5, 15]).tolist() == [1, 2]
    tab = signal_from_spec({"kind": "table", "times": [0, 10, 20], "values": [0, 10, 0]}, what="t")
    assert tab.value([-5, 5, 15, 25]).tolist() == [0, 5, 5, 0]
    hold = signal_from_spec({"kind": "table", "times": [0, 10], "values": [1, 2],
                             "interpolation": "hold"}, what="t")
    assert hold.value([0, 9.9, 10, 50]).tolist() == [1, 1, 2, 2]


def test_random_walk_is_reproducible_whatever_the_query_order():
    spec = {"kind": "random_walk", "step_std": 0.1, "interval": 5, "low": -0.2, "high": 0.2}
    a = signal_from_spec(spec, what="rw", rng=42)
    b = signal_from_spec(spec, what="rw", rng=42)
    t = np.arange(0, 500, 1.0)
    late_first = b.value(t[::-1])[::-1]
    assert np.array_equal(a.value(t), late_first)
    v = a.value(t)
    assert v.min() >= -0.2 and v.max() <= 0.2 and np.ptp(v) > 0
    # piecewise constant over each interval
    assert np.all(v[:5] == 0.0) and len(np.unique(v[5:10])) == 1
    seeded = signal_from_spec(dict(spec, seed=3), what="rw", rng=999)
    assert np.array_equal(seeded.value(t), RandomWalk(0.1, 5, low=-0.2, high=0.2, rng=3).value(t))


def test_csv_table(tmp_path):
    p = tmp_path / "draw.csv"
    p.write_text("# plant historian export\ntime,flow\n0,1.5\n60,1.7\n120,1.6\n")
    s = signal_from_spec({"kind": "csv", "path": str(p), "interpolation": "hold"}, what="dvs.draw_off")
    assert s.value([0, 59, 60, 500]).tolist() == [1.5, 1.5, 1.7, 1.6]
    rel = signal_from_spec({"kind": "csv", "path": "draw.csv", "value_column": "flow"},
                           what="x", base_dir=tmp_path)
    assert rel.value(30.0) == pytest.approx(1.6)


@pytest.mark.parametrize("spec, message", [
    ({"kind": "pulse", "at": 0, "duration": -10, "size": 1}, r"sp.x \(pulse\): key 'duration': expected a number > 0, found -10"),
    ({"kind": "ramp", "start": 0, "duration": 0, "size": 1}, r"key 'duration': expected a number > 0, found 0"),
    ({"kind": "stpe", "at": 0, "size": 1}, r"unknown signal kind 'stpe' \(did you mean 'step'\?\)"),
    ({"kind": "step", "at": 0}, r"key 'size': expected the key 'size' \(kind 'step' needs it\)"),
    ({"kind": "step", "at": 0, "size": 1, "sise": 2}, r"unknown key 'sise'.*did you mean 'size'"),
    ({"kind": "sine", "amplitude": 1, "period": 0}, r"key 'period': expected a number > 0"),
    ({"kind": "step", "at": "soon", "size": 1}, r"key 'at': expected a number, found 'soon'"),
    ({"kind": "table", "times": [0, 20, 10], "values": [1, 2, 3]}, r"strictly increasing; found 10 at 2 after 20"),
    ({"kind": "table", "times": [0, 1], "values": [1]}, r"key 'values': expected as many values as times \(2\), found 1 values"),
    ({"kind": "random_walk", "step_std": 1, "interval": 1, "low": 1}, r"key 'low': expected low <= 0 <= high"),
    ([], r"empty list"),
    ("fast", r"expected a signal table with a 'kind'"),
])
def test_bad_specs_are_named(spec, message):
    with pytest.raises(mp.SettingsError, match=message):
        signal_from_spec(spec, what="sp.x")


def test_csv_errors_name_file_row_and_column(tmp_path):
    unsorted = tmp_path / "unsorted.csv"
    unsorted.write_text("t,v\n0,1\n20,2\n10,3\n")
    with pytest.raises(mp.SettingsError, match=r"unsorted.csv.*strictly increasing; found 10 at row 4 after 20 at row 3"):
        signal_from_spec({"kind": "csv", "path": str(unsorted)}, what="dvs.feed")
    gap = tmp_path / "gap.csv"
    gap.write_text("t,v\n0,1\n10,\n20,3\n")
    with pytest.raises(mp.SettingsError, match=r"gap.csv.*row 3, column 'v' must hold a finite number; found ''"):
        table_from_csv(gap, what="dvs.feed")
    sparse = tmp_path / "sparse.csv"
    sparse.write_text("t,v\n0,1\n10,2\n300,3\n")
    with pytest.raises(mp.SettingsError, match=r"gap of 290 between 10 \(row 3\) and 300 \(row 4\), more than max_gap=60"):
        signal_from_spec({"kind": "csv", "path": str(sparse), "max_gap": 60}, what="dvs.feed")
    with pytest.raises(mp.SettingsError, match=r"no column named 'flwo'.*did you mean 'flow'"):
        p = tmp_path / "ok.csv"
        p.write_text("t,flow\n0,1\n1,2\n")
        signal_from_spec({"kind": "csv", "path": str(p), "value_column": "flwo"}, what="dvs.feed")
    with pytest.raises(mp.SettingsError, match=r"cannot be read"):
        signal_from_spec({"kind": "csv", "path": str(tmp_path / "missing.csv")}, what="dvs.feed")
