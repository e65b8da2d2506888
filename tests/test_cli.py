"""The commands as a chromatographer meets them (in-process with typer's CliRunner).

External references: the open data (a real system's measured times, RepoRT-derived,
CC BY-SA 4.0) for the calibrated prediction; the pickle protocol (Python docs: unpickling
runs ``__reduce__`` callables) for the unsafe-model check.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import pickle
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from tests_support import write_system_method
from typer.testing import CliRunner

from retpred.cli import app

runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture()
def analytes(tmp_path) -> Path:
    p = tmp_path / "analytes.csv"
    p.write_text(
        "name,smiles,lot\n"
        "caffeine,Cn1cnc2c1c(=O)n(C)c(=O)n2C,A1\n"
        "broken,C1CC(,A2\n"
        "toluene,Cc1ccccc1,A3\n"
        "ibuprofen,CC(C)Cc1ccc(C(C)C(=O)O)cc1,A4\n",
        encoding="utf-8",
    )
    return p


def test_demo_runs_and_names_every_analyte(shipped_model, demo_dir):
    res = run("demo")
    assert res.exit_code == 0, res.output
    names = pd.read_csv(demo_dir / "analytes.csv")["name"]
    for n in names:
        assert n[:20] in res.output
    assert "verdict" in res.output
    assert " ".join(res.output.split()).count("confirm them by injecting") == 1  # once


def test_predict_bad_row_reported_rest_predicted(shipped_model, analytes, demo_dir, tmp_path):
    out = tmp_path / "out.csv"
    res = run("predict", analytes, "--method", demo_dir / "method.toml", "--out", out, "-q")
    assert res.exit_code == 0, res.output
    df = pd.read_csv(out)
    assert df["name"].tolist() == ["caffeine", "broken", "toluene", "ibuprofen"]  # input order
    for col in ("name", "smiles", "status", "rt_min", "rt_low_min", "rt_high_min",
                "elution_order", "peak_width_min", "resolution_next", "coelution_risk",
                "coelutes_with", "logp", "logd", "charge", "species", "lot"):
        assert col in df.columns, col
    assert "unparseable" in df.loc[1, "status"] and np.isnan(df.loc[1, "rt_min"])
    ok = df.drop(index=1)
    assert (ok["status"] == "ok").all()
    assert np.all(ok["rt_low_min"] <= ok["rt_min"]) and np.all(ok["rt_min"] <= ok["rt_high_min"])
    # caffeine (log P ~ -0.1) before toluene (2.7): polar first (common practice)
    assert ok.set_index("name").loc["caffeine", "rt_min"] < ok.set_index("name").loc[
        "toluene", "rt_min"]
    assert df["lot"].tolist() == ["A1", "A2", "A3", "A4"]


def test_columns_and_scan_name_the_unusable_analyte_and_show_the_caution(
        shipped_model, analytes, demo_dir, tmp_path):
    # the comparison ranks the three good analytes; the broken one is named, not dropped
    # silently, and both method-development commands carry the caution
    out = tmp_path / "cols.csv"
    res = run("columns", analytes, "--method", demo_dir / "method.toml", "--phases", "C18,C8",
              "--out", out)
    assert res.exit_code == 0, res.output
    flat = " ".join(res.output.split())
    assert "broken (unparseable" in flat and "confirm them by injecting" in flat
    order = pd.read_csv(out)["order"]
    assert all(len(o.split(" > ")) == 3 and "broken" not in o for o in order)
    res = run("scan", analytes, "--method", demo_dir / "method.toml", "--ph", "2.5:3.5:0.5")
    assert res.exit_code == 0, res.output
    flat = " ".join(res.output.split())
    assert flat.count("broken") == 1 and "could not be used" in flat
    assert "confirm them by injecting" in flat


def test_scan_ph_and_gradient_time_together_give_a_map(shipped_model, analytes, demo_dir,
                                                       tmp_path):
    # both levers at once: one summary row per (ramp, pH), one chosen cell, a PNG map;
    # the chosen ramp and pH are the ones the terminal names
    summ, png = tmp_path / "s.csv", tmp_path / "map.png"
    res = run("scan", analytes, "-m", demo_dir / "method.toml", "--ph", "2.5:4.5:0.5",
              "--gradient-time", "5:15:5", "--summary-out", summ, "--plot", png)
    assert res.exit_code == 0, res.output
    per = pd.read_csv(summ)
    assert len(per) == 3 * 5 and set(per.gradient_time_min) == {5.0, 10.0, 15.0}
    chosen = per[per.best]
    assert len(chosen) == 1
    flat = " ".join(res.output.split())
    assert (f"a {chosen.gradient_time_min.iloc[0]:g} min ramp at pH "
            f"{chosen.value.iloc[0]:g}") in flat
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    bad = run("scan", analytes, "-m", demo_dir / "method.toml", "--ph", "2:4:1",
              "--gradient-time", "5:15:5", "--phases", "C8")
    assert bad.exit_code == 2 and "--phases" in bad.output and "Traceback" not in bad.output


def test_columns_detail_matches_predict_on_that_phase(shipped_model, analytes, demo_dir,
                                                      tmp_path):
    # the per-phase detail is the prediction path itself: the C8 rows are what `predict`
    # gives for the method with its phase set to C8, and the summary's order is their order
    method = tmp_path / "c8.toml"
    method.write_text((demo_dir / "method.toml").read_text(encoding="utf-8").replace(
        'phase = "C18"', 'phase = "C8"'), encoding="utf-8")
    summary, detail, pred = tmp_path / "s.csv", tmp_path / "d.csv", tmp_path / "p.csv"
    res = run("columns", analytes, "--method", demo_dir / "method.toml", "--phases", "C18,C8",
              "--out", summary, "--detail-out", detail, "-q")
    assert res.exit_code == 0, res.output
    res = run("predict", analytes, "--method", method, "--out", pred, "-q")
    assert res.exit_code == 0, res.output
    d = pd.read_csv(detail)
    assert sorted(d["phase"].unique()) == ["C18", "C8"] and len(d) == 8
    c8 = d[d["phase"] == "C8"].reset_index(drop=True)
    p = pd.read_csv(pred)
    assert c8["name"].tolist() == p["name"].tolist()
    np.testing.assert_allclose(c8["rt_min"], p["rt_min"], rtol=1e-9, equal_nan=True)
    np.testing.assert_allclose(c8["peak_width_min"], p["peak_width_min"], rtol=1e-9,
                               equal_nan=True)
    s = pd.read_csv(summary).set_index("phase")
    for phase, rows in d.groupby("phase"):
        ok = rows[np.isfinite(rows["rt_min"])].sort_values("rt_min")
        assert s.loc[phase, "order"] == " > ".join(ok["name"])


def test_columns_compares_method_files_with_their_own_hsm(shipped_model, analytes, demo_dir,
                                                         tmp_path):
    # A file that gives the C8 class medians as its own [column.hsm] must predict what the
    # class comparison predicts for C8 (one path for "own column" and "class median"); the
    # files are ranked by the same rule, labelled by file name.
    from dataclasses import asdict

    from retpred.column import class_hsm

    text = (demo_dir / "method.toml").read_text(encoding="utf-8")
    hsm = "\n".join(f"{k} = {v!r}" for k, v in asdict(class_hsm("C8")).items())
    own = tmp_path / "own-c8.toml"
    own.write_text(text.replace('phase = "C18"', 'phase = "C8"').replace(
        "[mobile_phase]", f"[column.hsm]\n{hsm}\n\n[mobile_phase]"), encoding="utf-8")
    summary, detail, png = tmp_path / "s.csv", tmp_path / "d.csv", tmp_path / "c.png"
    res = run("columns", analytes, "-m", demo_dir / "method.toml", "-m", own,
              "--out", summary, "--detail-out", detail, "--plot", png)
    assert res.exit_code == 0, res.output
    assert "own-c8.toml" in res.output and "verdict" in res.output
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    d = pd.read_csv(detail)
    assert sorted(d["method"].unique()) == ["method.toml", "own-c8.toml"]
    classes = tmp_path / "classes.csv"
    res = run("columns", analytes, "-m", demo_dir / "method.toml", "--phases", "C8",
              "--detail-out", classes, "-q")
    assert res.exit_code == 0, res.output
    by_class = pd.read_csv(classes)
    mine = d[d["method"] == "own-c8.toml"].reset_index(drop=True)
    np.testing.assert_allclose(mine["rt_min"], by_class["rt_min"], rtol=1e-9, equal_nan=True)
    s = pd.read_csv(summary)
    assert s["rank"].tolist() == [1, 2] and set(s["phase"]) == {"C18", "C8"}
    # fewest unresolved pairs first, then the larger smallest resolution
    key = list(zip(s["n_unresolved"], -s["min_resolution"], strict=True))
    assert key == sorted(key)
    # --phases with several files, or one file twice: one line, exit 2
    res = run("columns", analytes, "-m", demo_dir / "method.toml", "-m", own, "--phases", "C8")
    assert res.exit_code == 2 and "--phases" in res.output
    res = run("columns", analytes, "-m", own, "-m", own)
    assert res.exit_code == 2 and "twice" in res.output


def test_columns_with_one_analyte_gives_no_verdict(shipped_model, demo_dir, tmp_path):
    # one structure and one broken one: no pair on any phase, so no "best" phase is named
    one = tmp_path / "one.csv"
    one.write_text("name,smiles\ntoluene,Cc1ccccc1\nbroken,C1CC(\n", encoding="utf-8")
    res = run("columns", one, "--method", demo_dir / "method.toml")
    assert res.exit_code == 0, res.output
    flat = " ".join(res.output.split())
    assert "no pair to separate" in flat and "separates this list best" not in flat


def test_output_is_deterministic(shipped_model, analytes, demo_dir, tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    for p in (a, b):
        assert run("predict", analytes, "-m", demo_dir / "method.toml", "--out", p,
                   "-q").exit_code == 0
    assert hashlib.sha256(a.read_bytes()).digest() == hashlib.sha256(b.read_bytes()).digest()


def test_refuses_to_overwrite(shipped_model, analytes, demo_dir, tmp_path):
    res = run("predict", analytes, "-m", demo_dir / "method.toml", "--out", analytes, "-q")
    assert res.exit_code == 2 and "input" in res.output
    out = tmp_path / "exists.csv"
    out.write_text("keep me")
    res = run("predict", analytes, "-m", demo_dir / "method.toml", "--out", out, "-q")
    assert res.exit_code == 2 and "--force" in res.output
    assert out.read_text() == "keep me"
    res = run("predict", analytes, "-m", demo_dir / "method.toml", "--out", out, "-q", "--force")
    assert res.exit_code == 0 and out.read_text() != "keep me"


def test_bad_method_one_line_exit_2(shipped_model, analytes, tmp_path):
    m = tmp_path / "bad.toml"
    m.write_text(
        '[column]\nphase="C18"\nlength_mm=100\ninner_diameter_mm=2.1\nparticle_um=1.7\n'
        '[mobile_phase]\norganic="acetonitrile"\n'
        "[gradient]\nflow_ml_min=-0.4\nprogram=[[0,5],[10,95]]\n"
    )
    res = run("predict", analytes, "-m", m)
    assert res.exit_code == 2
    assert "Traceback" not in res.output
    line = res.output.strip().splitlines()[-1]
    assert "bad.toml" in line and "flow_ml_min" in line


class _Payload:
    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):  # runs on unpickling (Python pickle documentation)
        return (Path.write_text, (self.marker, "pwned"))


def test_crafted_pickle_model_is_refused_and_never_runs(analytes, demo_dir, tmp_path):
    marker = tmp_path / "marker.txt"
    evil = tmp_path / "evil.skops"
    evil.write_bytes(pickle.dumps(_Payload(marker)))
    # sanity: this file really would run code if it were unpickled
    pickle.loads(evil.read_bytes())
    assert marker.read_text() == "pwned"
    marker.unlink()
    res = run("predict", analytes, "-m", demo_dir / "method.toml", "--model", evil, "-q")
    assert res.exit_code == 2
    assert "refused" in res.output or "not a retpred model" in res.output
    assert not marker.exists()


@pytest.mark.opendata
def test_calibrants_improve_a_real_system(shipped_model, open_data, open_systems, tmp_path):
    """Dataset 0002 (RepoRT-derived open data): 10 measured calibrants must bring the
    prediction of the other compounds closer to their measured times."""
    from retpred.opendata import load_compounds

    system = next(s for s in open_systems if s.dataset == "0002")
    rows = load_compounds(open_data, {"0002"}).sample(n=70, random_state=0)
    method = tmp_path / "m.toml"
    write_system_method(system, method)
    cal, rest = rows.iloc[:10], rows.iloc[10:]
    cal_p, rest_p = tmp_path / "cal.csv", tmp_path / "rest.csv"
    cal[["name", "smiles", "rt_min"]].to_csv(cal_p, index=False)
    rest[["name", "smiles"]].to_csv(rest_p, index=False)
    z, c = tmp_path / "z.csv", tmp_path / "c.csv"
    assert run("predict", rest_p, "-m", method, "--out", z, "-q").exit_code == 0
    res = run("predict", rest_p, "-m", method, "--calibrants", cal_p, "--out", c, "-q")
    assert res.exit_code == 0, res.output
    obs = rest["rt_min"].to_numpy()
    err_z = np.nanmedian(np.abs(pd.read_csv(z)["rt_min"].to_numpy() - obs))
    err_c = np.nanmedian(np.abs(pd.read_csv(c)["rt_min"].to_numpy() - obs))
    assert err_c < err_z


def test_calibrate_writes_file_used_by_predict(shipped_model, demo_dir, analytes, tmp_path):
    cal = tmp_path / "cal.csv"
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(["name", "smiles", "rt_min"])
    # invented standards (demo-only data: checks the plumbing, not accuracy)
    w.writerows([["caffeine", "Cn1cnc2c1c(=O)n(C)c(=O)n2C", 1.9],
                 ["toluene", "Cc1ccccc1", 7.1], ["naphthalene", "c1ccc2ccccc2c1", 7.9]])
    cal.write_text(buf.getvalue())
    out = tmp_path / "sys.cal"
    res = run("calibrate", cal, "-m", demo_dir / "method.toml", "--out", out)
    assert res.exit_code == 0, res.output
    assert "3 standard structure(s) kept" in res.output
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    assert run("predict", analytes, "-m", demo_dir / "method.toml", "--calibration", out,
               "--out", a, "-q").exit_code == 0
    assert run("predict", analytes, "-m", demo_dir / "method.toml", "--calibrants", cal,
               "--out", b, "-q").exit_code == 0
    assert a.read_bytes() == b.read_bytes()
    # caffeine and toluene are standards too: their measured times come back
    got = pd.read_csv(a).set_index("name")
    for name, rt in (("caffeine", 1.9), ("toluene", 7.1)):
        assert got.loc[name, "rt_min"] == pytest.approx(rt, abs=1e-3)
        assert got.loc[name, "status"] == "measured standard"
    assert got.loc["ibuprofen", "status"] != "measured standard"


def test_scan_with_calibrants_matches_calibrated_predict(shipped_model, demo_dir, analytes,
                                                        tmp_path):
    # the same calibration, fitted at the method's pH: a pH scan point at that pH must give
    # the times that predict gives with it, and differ from the uncalibrated scan
    cal = tmp_path / "cal.csv"
    # invented standards (demo-only data: checks the plumbing, not accuracy)
    cal.write_text("name,smiles,rt_min\ncaffeine,Cn1cnc2c1c(=O)n(C)c(=O)n2C,1.9\n"
                   "phenol,Oc1ccccc1,4.0\ntoluene,Cc1ccccc1,7.1\n"
                   "naphthalene,c1ccc2ccccc2c1,7.9\n")
    method = demo_dir / "method.toml"
    pred, long, plain = tmp_path / "p.csv", tmp_path / "s.csv", tmp_path / "s0.csv"
    assert run("predict", analytes, "-m", method, "--calibrants", cal, "--out", pred,
               "-q").exit_code == 0
    res = run("scan", analytes, "-m", method, "--ph", "2.7:2.7:0.1", "--calibrants", cal,
              "--out", long)
    assert res.exit_code == 0, res.output
    assert "calibrated with 4 reference compound(s)" in res.output
    assert run("scan", analytes, "-m", method, "--ph", "2.7:2.7:0.1", "--out", plain,
               "-q").exit_code == 0
    p = pd.read_csv(pred).dropna(subset=["rt_min"]).set_index("name")["rt_min"]
    sc = pd.read_csv(long).set_index("analyte")["rt_min"].loc[p.index]
    s0 = pd.read_csv(plain).set_index("analyte")["rt_min"].loc[p.index]
    np.testing.assert_allclose(sc.to_numpy(), p.to_numpy(), rtol=0, atol=1e-6)
    assert np.max(np.abs(s0.to_numpy() - p.to_numpy())) > 0.05
    # a calibration belongs to its column: not with a phase comparison
    bad = run("scan", analytes, "-m", method, "--ph", "2:4:1", "--phases", "all",
              "--calibrants", cal)
    assert bad.exit_code == 2 and "--phases" in bad.output


def test_calibration_file_from_another_model_is_warned(shipped_model, demo_dir, analytes,
                                                       tmp_path):
    # invented standards (demo-only data: checks the plumbing, not accuracy)
    cal = tmp_path / "cal.csv"
    cal.write_text("name,smiles,rt_min\ncaffeine,Cn1cnc2c1c(=O)n(C)c(=O)n2C,1.9\n"
                   "toluene,Cc1ccccc1,7.1\nnaphthalene,c1ccc2ccccc2c1,7.9\n")
    out = tmp_path / "sys.cal"
    assert run("calibrate", cal, "-m", demo_dir / "method.toml", "--out", out).exit_code == 0
    d = json.loads(out.read_text())
    assert d["model_id"] == shipped_model.identity()
    same = run("predict", analytes, "-m", demo_dir / "method.toml", "--calibration", out,
               "--out", tmp_path / "a.csv")
    assert same.exit_code == 0 and "another model" not in same.output
    d["model_id"] = "0123456789abcdef"
    other = tmp_path / "other.cal"
    other.write_text(json.dumps(d))
    res = run("predict", analytes, "-m", demo_dir / "method.toml", "--calibration", other,
              "--out", tmp_path / "b.csv")
    assert res.exit_code == 0
    assert "another model" in " ".join(res.output.split())
    # the correction itself is still applied, as the file says
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
