"""Calibration on the virtual rig: the reference model, rank choice, model file, bad input."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

from wingwatch.daemon.calibrate import CalibrationError, calibrate, load_record
from wingwatch.daemon.config import load_config
from wingwatch.daemon.errors import ModelFileError
from wingwatch.daemon.modelfile import load_model, save_model
from wingwatch.daemon.rig.scenario import scenario_dir, scenario_from_dict
from wingwatch.daemon.rig.source import VirtualRig, write_rig_log

REPO = Path(__file__).resolve().parents[1]
CAL = REPO / "replay_logs" / "rig-calibration.wwlog"
TEST = REPO / "replay_logs" / "rig-test-manoeuvre.wwlog"


def rig_log(tmp: Path, name: str, **changes) -> Path:
    """Run a scenario (with table overrides) through the rig into a log file."""
    doc = tomllib.loads((scenario_dir() / f"{changes.pop('base', 'calibration')}.toml").read_text())
    for table, values in changes.items():
        if table == "ramp":
            doc["motion"]["ramps"][0].update(values)
        else:
            doc.setdefault(table, {}).update(values)
    path = tmp / f"{name}.wwlog"
    return write_rig_log(VirtualRig(scenario_from_dict(doc)), path)


@pytest.fixture(scope="module")
def shipped():
    return calibrate(load_record(CAL), load_record(TEST))


def test_flexible_rig_model_predicts_the_test_manoeuvre(shipped):
    e = shipped.errors_by_rank[shipped.model.rank]
    # Issue targets: normalised RMS error below 5 % for C_L and 10 % for curvature.
    assert e["lift"] < 0.05 and e["curvature"] < 0.10
    assert 4 <= shipped.model.rank <= 12  # "rank around 8 is typical" (common practice, no source)


def test_error_falls_with_rank_then_flattens(shipped):
    err = {r: max(e["lift"], e["curvature"]) for r, e in shipped.errors_by_rank.items()}
    low = min(err[1], err[2])
    high = [err[r] for r in err if r >= 8]
    assert max(high) < 0.5 * low  # falls
    assert max(high) - min(high) < 0.5 * min(high) + 0.005  # then flattens
    # low ranks visibly miss the bending transients in curvature
    assert shipped.errors_by_rank[1]["curvature"] > 3 * shipped.errors_by_rank[shipped.model.rank]["curvature"]


def test_contributions_and_point_reads_are_reported(shipped):
    s = shipped.summary()
    for key in ("rank", "quasi_steady", "rate", "added_mass", "hankel_sv", "errors_by_rank"):
        assert key in s
    shares = s["contributions"]
    for out in ("lift", "curvature"):
        assert sum(v[out] for v in shares.values()) == pytest.approx(1.0)
    # the quasi-steady term carries most of the energy of a pitch-up/hold/down manoeuvre
    assert shares["quasi_steady"]["lift"] > 0.9
    # the point read and the least-squares quasi-steady columns agree closely on a clean log
    assert s["point_read"]["quasi_steady"]["lift"] == pytest.approx(s["quasi_steady"]["lift"], rel=0.02)


def test_model_file_round_trip_and_refusals(shipped, tmp_path):
    p = save_model(shipped.model, tmp_path / "m.wwmodel.json")
    m = load_model(p)
    for a, b in ((m.A, shipped.model.A), (m.B, shipped.model.B), (m.C, shipped.model.C),
                 (m.k_qs, shipped.model.k_qs), (m.k_am, shipped.model.k_am)):
        assert np.array_equal(a, b)  # exact: shortest round-trip float repr in JSON
    d = json.loads(p.read_text())
    cases = {
        "truncated": p.read_text()[:200],
        "version": json.dumps({**d, "version": 7}),
        "shape": json.dumps({**d, "B": d["B"][:-1]}),
        "nan": p.read_text().replace(str(d["A"][0][0]), "NaN", 1),
        "unstable": json.dumps({**d, "A": (2 * np.eye(d["rank"])).tolist()}),
    }
    words = {"truncated": "truncated", "version": "version 7", "shape": "'B' has shape",
             "nan": "'A'", "unstable": "unstable"}
    for name, text in cases.items():
        bad = tmp_path / f"{name}.json"
        bad.write_text(text)
        with pytest.raises(ModelFileError, match=words[name]):
            load_model(bad)


def test_rigid_plate_columns_are_thin_airfoil_and_theodorsen(tmp_path):
    log = rig_log(tmp_path, "rigid", article={"n_modes": 0},
                  viscous={"low_re": False, "stall": False})
    res = calibrate(load_record(log), max_rank=6)
    # Thin-airfoil theory (Glauert): lift slope 2 pi per rad; issue tolerance 2 %.
    assert res.model.k_qs[0] == pytest.approx(2 * np.pi, rel=0.02)
    assert res.point_read["quasi_steady"][0] == pytest.approx(2 * np.pi, rel=0.02)
    # Added mass: Theodorsen's non-circulatory lift for pitch about x = a b from mid-chord is
    # C_L = pi b alpha_dot / U - pi a b^2 alpha_ddot / U^2 (T. Theodorsen, NACA Report 496, 1935;
    # C_L on the chord 2 b). The rig pivots at the leading edge (a = -1): K_am = pi b^2 / U^2.
    # Issue tolerance 5 %.
    doc = tomllib.loads((scenario_dir() / "calibration.toml").read_text())
    b, speed = 0.05, doc["fluid"]["speed_m_s"]  # semichord of the 0.1 m strip (docs/rig.md)
    assert res.model.k_am[0] == pytest.approx(np.pi * b**2 / speed**2, rel=0.05)
    # ... and the estimate's own one-sigma error is honest about how close it is
    assert abs(res.model.k_am[0] - np.pi * b**2 / speed**2) < 4 * res.model.sd["added_mass"][0] + 0.01 * res.model.k_am[0]
    assert any("curvature" in n for n in res.notes)  # a rigid plate: no curvature response


def test_coefficients_repeat_within_their_uncertainty_across_seeds(tmp_path):
    vals, sds = [], []
    for seed in range(10):
        log = rig_log(tmp_path, f"s{seed}", scenario={"seed": 100 + seed})
        res = calibrate(load_record(log), rank=8, max_rank=8)
        vals.append(np.concatenate([res.model.k_qs, res.model.k_rate, res.model.k_am]))
        sds.append(np.concatenate([res.model.sd[k] for k in ("quasi_steady", "rate", "added_mass")]))
        log.unlink()
    vals, sds = np.array(vals), np.array(sds)
    spread = vals.std(axis=0, ddof=1)
    # The reported one-sigma uncertainty must not understate the seed-to-seed scatter (factor 2
    # allowed for a 10-sample standard deviation; common practice, no source).
    assert np.all(spread <= 2.0 * sds.mean(axis=0))
    assert np.all(np.abs(vals - vals.mean(axis=0)) <= 4.0 * sds)


@pytest.mark.parametrize(
    "name, changes, words",
    [
        ("flat", {"ramp": {"delta_deg": 0.0}}, "no pitch-up manoeuvre"),
        ("tiny", {"ramp": {"delta_deg": 0.3}}, "no pitch-up manoeuvre"),
        ("early", {"ramp": {"start_s": 0.2}}, "quiet before it"),
        ("short", {"scenario": {"duration_s": 9.0}}, "not settled"),
    ],
)
def test_bad_manoeuvres_are_refused_with_what_to_do(tmp_path, name, changes, words):
    log = rig_log(tmp_path, name, **changes)
    out = tmp_path / f"{name}.wwmodel.json"
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "calibrate", str(log),
                        "--out", str(out)], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2, r.stderr
    assert words in r.stderr and "Traceback" not in r.stderr
    assert not out.exists()  # no model file written


def test_missing_channel_is_named(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[outputs.curvature]\nstrain = 'strain_mid'\n")  # still valid, other gauge
    rec = load_record(CAL, config=load_config(cfg))
    assert rec.y.shape[1] == 2
    bad = tmp_path / "b.toml"
    bad.write_text(
        "[streams.rig]\nrate_hz = 1000.0\n"
        "channels = ['pitch_enc', 'balance_lift', 'q_pitot', 'strain_root', 'strain_mid', 'strain_tip']\n"
        "[channels.strain_tip]\nquantity = 'strain'\nunits = 'microstrain'\ngain = 1e-6\noffset = 0.0\n"
        "[channels.pitch_enc]\nquantity = 'angle'\nunits = 'deg'\ngain = 0.017453292519943295\noffset = 0.0\n"
        "[channels.balance_lift]\nquantity = 'force'\nunits = 'N'\ngain = 1.0\noffset = 0.0\n"
        "[channels.q_pitot]\nquantity = 'pressure'\nunits = 'Pa'\ngain = 1.0\noffset = 0.0\n"
        "[channels.strain_root]\nquantity = 'strain'\nunits = 'microstrain'\ngain = 1e-6\noffset = 0.0\n"
        "[channels.strain_mid]\nquantity = 'strain'\nunits = 'microstrain'\ngain = 1e-6\noffset = 0.0\n"
        "[outputs.curvature]\nstrain = 'strain_tip'\n")
    with pytest.raises(CalibrationError, match="strain_tip"):
        load_record(CAL, config=load_config(bad))


def test_contribution_plot_is_a_png_of_the_stated_size(tmp_path):
    pytest.importorskip("matplotlib")
    out = tmp_path / "m.wwmodel.json"
    png = tmp_path / "contrib.png"
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "calibrate", str(CAL),
                        "--test", str(TEST), "--out", str(out), "--plot", str(png), "--rank", "6"],
                       capture_output=True, text=True, timeout=180)
    assert r.returncode == 0, r.stderr
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, ISO/IEC 15948)
    w, h = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert (w, h) == (900, 600)  # 9 x 6 in at 100 dpi, as the plot is made
    assert load_model(out).rank == 6
