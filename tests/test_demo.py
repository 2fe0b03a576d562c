"""The one-command demo, bounded and headless, as CI runs it: models are published and the
campaign's first scripted event is detected; the recorded run replays identically."""

from __future__ import annotations

import json
import subprocess
import sys

from conftest import write_config


def test_demo_headless_30_s(tmp_path):
    cfg = write_config(tmp_path)
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "demo", "--duration", "30",
                        "--headless", "--json", "--config", str(cfg)], capture_output=True,
                       text=True, timeout=240, cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-2000:]
    s = json.loads(r.stdout)
    assert s["models_published"] >= 1
    first = s["scripted_events"][0]
    assert first["event"] == "flow-speed" and first["detected"], s["scripted_events"]
    assert s["rejected"] == 0 and s["accepted"] >= 2500  # ~30 s of 10 ms frames
    assert "advisory" in r.stderr.lower()
    # the live-recorded run replays to the same decisions, byte for byte
    rep = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "replay", s["log"],
                          "--compare", "--json"], capture_output=True, text=True, timeout=240,
                         cwd=tmp_path)
    assert rep.returncode == 0, rep.stderr[-2000:]
    out = json.loads(rep.stdout)
    assert out["compare"]["identical"] is True
    assert out["models_published"] >= 1
    again = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "replay", s["log"],
                            "--json"], capture_output=True, text=True, timeout=240, cwd=tmp_path)
    assert json.loads(again.stdout)["output_digest"] == out["output_digest"]
