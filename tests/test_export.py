"""The hand-off bundle: schema, model content against published models, the round trip, the CLI.

References named beside the checks: Wood & Berry (1973) for the column's transfer functions,
scipy.signal.dstep as the reference for step-response coefficients, jsonschema as the reference
validator of the bundle's JSON Schema.
"""

from __future__ import annotations

import csv
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

import mpcproto as mp
from mpcproto.cli import main
from mpcproto.exceptions import SettingsError
from mpcproto.export import check_bundle, export_bundle, load_schema, read_bundle, step_coefficients
from mpcproto.export.bundle import settings_from_plain, settings_to_plain

jsonschema = pytest.importorskip("jsonschema")

ROOT = Path(__file__).resolve().parents[1]
SCENARIOS = sorted(p for p in (ROOT / "scenarios").glob("*.toml")
                   if any(s["kind"] == "mpc" for s in
                          mp.load_scenario(p).data["controllers"].values()))


@pytest.fixture(scope="module")
def wood_berry(tmp_path_factory):
    out = tmp_path_factory.mktemp("bundle") / "wb"
    res = export_bundle(ROOT / "scenarios" / "wood_berry_column.toml", out, ci=True)
    return out, res


def _validator():
    return jsonschema.Draft202012Validator(load_schema())


# ------------------------------------------------------------------------------------ schema
def test_bundle_validates_against_its_schema(wood_berry):
    out, res = wood_berry
    jsonschema.Draft202012Validator.check_schema(load_schema())   # the schema itself is valid
    doc = json.loads((out / "bundle.json").read_text())
    errors = list(_validator().iter_errors(doc))
    assert errors == []
    assert doc == res["bundle"]
    # every file the bundle lists is there with its hash; the scenario copy is byte for byte
    for name in doc["files"]:
        assert (out / name).is_file(), name
    src = ROOT / "scenarios" / "wood_berry_column.toml"
    assert (out / doc["scenario"]["copy"]).read_bytes() == src.read_bytes()
    import hashlib

    assert doc["scenario"]["sha256"] == hashlib.sha256(src.read_bytes()).hexdigest()


def test_schema_refuses_a_broken_bundle(wood_berry, tmp_path):
    out, _ = wood_berry
    doc = json.loads((out / "bundle.json").read_text())
    bad = json.loads(json.dumps(doc))
    bad["settings"]["mv"]["reflux"]["scale"] = -1.0
    assert any("scale" in ".".join(map(str, e.absolute_path)) for e in _validator().iter_errors(bad))
    d = tmp_path / "b"
    shutil.copytree(out, d)
    (d / "bundle.json").write_text(json.dumps(bad))
    with pytest.raises(SettingsError, match=r"settings\.mv\.reflux\.scale"):
        read_bundle(d)
    newer = dict(doc, format_version=99)
    (d / "bundle.json").write_text(json.dumps(newer))
    with pytest.raises(SettingsError, match="format_version"):
        read_bundle(d)
    with pytest.raises(SettingsError, match="no such file"):
        read_bundle(tmp_path / "nowhere")


# ------------------------------------------------------------------------------------ model content
#: Wood & Berry (1973), Ind. Eng. Chem. Process Des. Dev. 12(4): distillate and bottoms
#: compositions (mol%) against reflux and steam (lb/min) and the feed flow (lb/min).
WOOD_BERRY = {("top_composition", "reflux"): (12.8, 16.7, 1.0),
              ("top_composition", "steam"): (-18.9, 21.0, 3.0),
              ("bottom_composition", "reflux"): (6.6, 10.9, 7.0),
              ("bottom_composition", "steam"): (-19.4, 14.4, 3.0),
              ("top_composition", "feed"): (3.8, 14.9, 8.1),
              ("bottom_composition", "feed"): (4.9, 13.2, 3.4)}


def test_fits_recover_the_published_wood_berry_transfer_functions(wood_berry):
    _, res = wood_berry
    doc = res["bundle"]
    assert doc["sample_time"] == 1.0
    fits = {(f["cv"], f["input"]): f for f in doc["model"]["fits"]}
    assert set(fits) == set(WOOD_BERRY)
    for pair, (K, tau, theta) in WOOD_BERRY.items():
        f = fits[pair]
        assert f["recommended"] == "fopdt", pair
        p = f["fits"]["fopdt"]
        # the controller's model keeps the fractional dead times exactly (8.1 and 3.4 min)
        assert p["gain"] == pytest.approx(K, rel=1e-6), pair
        assert p["time_constants"][0] == pytest.approx(tau, rel=1e-6), pair
        assert p["dead_time"] == pytest.approx(theta, abs=1e-6), pair
        assert p["rms_error_percent"] < 1e-3
        assert f["gain"] == pytest.approx(K, rel=1e-9)


def test_step_response_csv_is_the_zoh_sampled_first_order_response(wood_berry):
    out, res = wood_berry
    sr = res["bundle"]["model"]["step_response"]
    with open(out / sr["file"], newline="") as fh:
        rows = list(csv.reader(fh))
    head, data = rows[0], np.array(rows[1:], float)
    assert head[0] == "time_min" and head[1:] == [c["column"] for c in sr["columns"]]
    assert data.shape == (sr["samples"] + 1, 7)
    # settled: every channel within 1 % of its gain at the end (the settling horizon's definition)
    t = data[:, 0]
    for j, col in enumerate(sr["columns"], start=1):
        K, tau, theta = WOOD_BERRY[(col["cv"], col["input"])]
        # closed form of K e^{-theta s}/(tau s + 1) sampled at t (ZOH step invariance; the fractional
        # dead times 8.1 and 3.4 min are exact in the controller's model)
        expected = np.where(t >= theta, K * (1 - np.exp(-(t - theta) / tau)), 0.0)
        np.testing.assert_allclose(data[:, j], expected, rtol=1e-9, atol=1e-12)
        assert abs(data[-1, j] - K) <= 0.01 * abs(K)
    assert sr["samples"] >= res["bundle"]["horizons"]["prediction"]


def test_step_coefficients_match_scipy_dstep():
    from scipy import signal

    rng = np.random.default_rng(3)
    A = rng.normal(size=(4, 4))
    A *= 0.9 / max(abs(np.linalg.eigvals(A)))
    B, Bd = rng.normal(size=(4, 2)), rng.normal(size=(4, 1))
    C, D, Dd = rng.normal(size=(3, 4)), rng.normal(size=(3, 2)), rng.normal(size=(3, 1))

    class M:   # the attributes step_coefficients reads
        pass

    m = M()
    m.A, m.B, m.Bd, m.C, m.D, m.Dd = A, B, Bd, C, D, Dd
    S = step_coefficients(m, 25)
    # scipy.signal.dstep as the reference: step of each input of the system (A, [B Bd], C, [D Dd])
    _, ys = signal.dstep((A, np.hstack([B, Bd]), C, np.hstack([D, Dd]), 1.0), n=26)
    for j, y in enumerate(ys):
        np.testing.assert_allclose(S[:, :, j], y, rtol=1e-12, atol=1e-12)


# ------------------------------------------------------------------------------------ the round trip
def test_settings_survive_json(wood_berry):
    out, _ = wood_berry
    ctl = mp.PredictiveController.from_bundle(out)
    plain = settings_to_plain(ctl)
    assert json.loads(json.dumps(plain)) == plain
    back = settings_from_plain(plain)
    assert back["mv"]["reflux"]["high"] == math.inf and back["cv"]["top_composition"]["low"] == -math.inf


def _closed_loop(path, controller):
    """The scenario's nominal closed loop (CI length, the nominal seed) under *controller*."""
    from mpcproto.scenario.runner import prepare
    from mpcproto.scenario.study import _case_seed

    scn = mp.load_scenario(path)
    prep = prepare(scn, ci=True)
    if isinstance(controller, str):
        from mpcproto.scenario.runner import build_controller

        controller = build_controller(controller, scn.data["controllers"][controller], prep,
                                      cache=False)
    return mp.simulate(prep.plant, controller, op=prep.op, Ts=scn.sample_time,
                       duration=prep.duration, rng=_case_seed(scn.seed, 0), **prep.sim)


def _recorded_moves(out):
    return np.array(json.loads((out / "replay.json").read_text())["steps"]["u"], float)


@pytest.mark.parametrize("path", SCENARIOS, ids=lambda p: p.stem)
def test_round_trip_same_moves_on_every_shipped_scenario(path, tmp_path):
    out = tmp_path / "bundle"
    res = export_bundle(path, out, ci=True, run_study=False)
    proof = res["proof"]
    assert proof["passed"], proof["message"]
    assert proof["samples"] > 50
    assert res["bundle"]["study"]["passed"] is False     # no study: never a pass by default
    # the real closed loop under the controller rebuilt from the bundle makes the moves of the
    # original's closed loop (recorded during the export; see the next test for that record)
    doc = read_bundle(out)
    run = _closed_loop(path, mp.PredictiveController.from_bundle(out))
    rec = _recorded_moves(out)
    assert run.status == res["bundle"]["proof"]["run_status"] and len(run) == rec.shape[0]
    for j, name in enumerate(doc["names"]["mvs"]):
        scale = doc["settings"]["mv"][name]["scale"]
        np.testing.assert_allclose(run.series("ucmd", name), rec[:, j], rtol=0,
                                   atol=1e-8 * scale, err_msg=name)
    if doc["model"]["open_loop_unstable"]:
        assert all(f["kind"] in ("unstable", "none") for f in doc["model"]["fits"])


def test_recorded_run_is_the_original_closed_loop(wood_berry):
    # recording does not change the run: a fresh original controller on the same closed loop
    # makes exactly the recorded moves, and so does the controller rebuilt from the bundle
    out, res = wood_berry
    path = ROOT / "scenarios" / "wood_berry_column.toml"
    rec = _recorded_moves(out)
    for ctl in ("mpc", mp.PredictiveController.from_bundle(out)):
        run = _closed_loop(path, ctl)
        for j, name in enumerate(res["bundle"]["names"]["mvs"]):
            np.testing.assert_array_equal(run.series("ucmd", name), rec[:, j])


def test_check_fails_when_the_bundle_is_changed(wood_berry, tmp_path):
    out, _ = wood_berry
    d = tmp_path / "tampered"
    shutil.copytree(out, d)
    assert check_bundle(d)["passed"]
    doc = json.loads((d / "bundle.json").read_text())
    doc["settings"]["mv"]["reflux"]["move_weight"] *= 3.0
    (d / "bundle.json").write_text(json.dumps(doc))
    rep = check_bundle(d)
    assert not rep["passed"] and rep["first_difference"] is not None
    assert rep["max_deviation"] > 1e-8
    assert main(["export", "--check", str(d)]) == 1
    # a changed data file is named even when the moves still agree
    d2 = tmp_path / "edited"
    shutil.copytree(out, d2)
    with open(d2 / "step_response.csv", "a") as fh:
        fh.write("\n")
    rep = check_bundle(d2)
    assert not rep["passed"] and rep["files"]["step_response.csv"] is False
    assert "step_response.csv" in rep["message"]
    # no recorded run: a failure, not a pass
    (d2 / "replay.json").unlink()
    assert check_bundle(d2)["passed"] is False


# ------------------------------------------------------------------------------------ people and CLI
def test_design_sheet_is_self_contained_and_carries_the_caution(wood_berry):
    out, res = wood_berry
    html = (out / "design_sheet.html").read_text()
    assert "data:image/png;base64," in html and "<script" not in html
    assert "src='http" not in html and 'src="http' not in html
    for words in ("independent safety systems", "management of change", "licensed engineers",
                  "Simulation only"):
        assert words in html
    doc = res["bundle"]
    for name in doc["names"]["mvs"] + doc["names"]["cvs"] + doc["names"]["dvs"]:
        assert name in html
    assert "ALL CRITERIA PASSED" in html if doc["study"]["passed"] else "NOT PASSED" in html
    assert doc["study"]["source"].startswith("nominal case run at export")
    assert doc["pid_baseline"] and doc["pid_baseline"][0]["loops"]


def test_cli_export_check_and_plot(wood_berry, tmp_path, capsys):
    out, _ = wood_berry
    assert main(["export", "--check", str(out)]) == 0
    assert "ROUND TRIP PROVED" in capsys.readouterr().out
    assert main(["export", "--check", str(tmp_path / "missing")]) == 2
    assert "bundle" in capsys.readouterr().err
    assert main(["export", str(ROOT / "scenarios" / "wood_berry_column.toml")]) == 2
    assert main(["export", str(ROOT / "scenarios" / "wood_berry_column.toml"), "--out",
                 str(tmp_path / "x"), "--controller", "pid"]) == 2
    assert "kind" in capsys.readouterr().err
    png = tmp_path / "steps.png"
    assert main(["linearize", str(ROOT / "scenarios" / "wood_berry_column.toml"), "--json",
                 "--plot", str(png)]) == 0
    json.loads(capsys.readouterr().out)          # stdout stays pure JSON
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_scenario_runs_the_controller_of_a_bundle(wood_berry, tmp_path):
    # [controllers.mpc] bundle = "DIR": the nominal run of the bundle's controller scores exactly
    # what the original scored in the study the bundle carries (same moves, same plant, same seed)
    out, res = wood_berry
    text = (ROOT / "scenarios" / "wood_berry_column.toml").read_text()
    head, tail = text.split("[controllers.mpc]\n", 1)
    tail = tail.split("\n\n", 1)[1]
    f = tmp_path / "from_bundle.toml"
    f.write_text(head + f'[controllers.mpc]\nbundle = "{out.name}"\n\n' + tail)
    shutil.copytree(out, tmp_path / out.name)       # a relative path: beside the scenario file
    from mpcproto.scenario.runner import _run

    rec, _ = _run(mp.load_scenario(f), ci=True)
    assert rec["status"] == "ok", rec["message"]
    want = res["bundle"]["study"]["controllers"]["mpc"]["kpi"]["cv"]
    got = rec["controllers"]["mpc"]["kpi"]["cv"]
    for cv in want:
        assert got[cv]["iae"] == pytest.approx(want[cv]["iae"], rel=1e-12, abs=1e-12), cv
    # a bundle of another unit is refused, naming the key
    other = tmp_path / "other.toml"
    qt = (ROOT / "scenarios" / "quadruple_tank_nmp.toml").read_text()
    h, t = qt.split("[controllers.mpc]\n", 1)
    other.write_text(h + f'[controllers.mpc]\nbundle = "{out}"\n\n' + t.split("\n\n", 1)[1])
    with pytest.raises(mp.ScenarioError, match=r"controllers\.mpc\.bundle"):
        from mpcproto.scenario.runner import check_scenario

        check_scenario(other)


def test_schema_solver_names_follow_the_controller_settings():
    # the bundle schema lists exactly the solvers the controller accepts (one source of truth:
    # mpcproto.control.mpc_settings)
    import json

    from mpcproto.control.mpc_settings import BACKUP_SOLVERS, SOLVERS

    schema = json.loads((Path(mp.__file__).parent / "control" / "bundle.schema.json").read_text())

    def find(o, key):
        if isinstance(o, dict):
            for k, v in o.items():
                if k == key and isinstance(v, dict) and "enum" in v:
                    return v["enum"]
                got = find(v, key)
                if got is not None:
                    return got
        return None

    assert set(find(schema, "solver")) == set(SOLVERS)
    assert set(find(schema, "backup_solver")) - {"none", None} == set(BACKUP_SOLVERS)
