"""Incident bundles: the slice is a valid log with exactly the recorded samples, and the bundle
holds the configuration, the model in service, the warnings and a PNG of the stated size."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from test_identifier import frames, motion, outputs
from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import peek_sensor_header
from wingwatch.daemon.config import load_config
from wingwatch.daemon.pipeline import Session
from wingwatch.daemon.service import make_pipeline, make_recorder


@pytest.fixture(scope="module")
def daemon_log(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("inc")
    cfg = load_config()
    alpha, ad, add = motion(40000, bandwidth=5.0)
    w = make_recorder(cfg, path=tmp / "run.wwlog", source="daemon", start_unix=0.0)
    s = Session(make_pipeline(cfg), recorder=w)
    for m in frames(alpha, outputs(alpha, ad, add), noise=1e-3):
        s.inbound(list(m), 1.0)
    w.close()
    return tmp / "run.wwlog"


def test_bundle_contents_and_exact_slice(daemon_log, tmp_path):
    out = tmp_path / "bundle"
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "replay", str(daemon_log),
                        "--incident", "30", "--window", "3", "--out", str(out), "--json"],
                       capture_output=True, text=True, timeout=240)
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    for name in ("slice.wwlog", "config.toml", "model_in_service.json", "warnings.json",
                 "report.txt"):
        assert (out / name).is_file(), name
    # the slice holds exactly the recorded frames of [27, 33] s, byte for byte
    orig = [x.payload for x in rl.LogReader.open(daemon_log) if x.kind == rl.KIND_INBOUND
            and 27.0 <= peek_sensor_header(x.payload)["t0"] <= 33.0]
    sl = rl.LogReader.open(out / "slice.wwlog")
    got = [x.payload for x in sl if x.kind == rl.KIND_INBOUND]
    assert got == orig and len(got) == 601 and not sl.damage
    assert sl.header["config"] == rl.LogReader.open(daemon_log).header["config"]
    m = json.loads((out / "model_in_service.json").read_text())
    assert m["status"] in ("accepted", "reference") and m["t"] <= 30.0
    assert s["model_in_service"] == m["model_id"]
    assert "Advisory only" in (out / "report.txt").read_text()
    if s["plot"]:
        data = (out / "incident.png").read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
        w, h = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
        assert (w, h) == (800, 960)  # 10 x 12 in at 80 dpi, as the bundle draws it
        assert len(data) > 20000  # not an empty canvas


def test_incident_outside_the_run_is_refused(daemon_log, tmp_path):
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "replay", str(daemon_log),
                        "--incident", "500", "--window", "3", "--out", str(tmp_path / "b")],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "no frames between" in r.stderr
