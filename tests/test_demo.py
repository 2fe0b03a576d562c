"""The one-command demo, bounded and headless, as CI runs it: models are published, the
campaign's first scripted event is detected, the example controller flies the rig in closed loop
with the daemon's models, and the recorded run replays identically."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np

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
    # the example controller: models from the daemon's feed, commands to the rig, and the rig
    # flew them (its angle is the controller's servo prediction, not the scenario's script)
    c = s["controller"]
    assert c["enabled"] and c["state"] == "tracking" and c["stopped_cleanly"], c
    assert s["threads_left_running"] == []
    identified = [m for m in c["models_received"] if m != "M000000"]  # M000000: the reference
    assert identified and c["model_in_use"] in identified and not c["models_refused"], c
    assert c["commands_sent"] >= 400 and c["plans_sent"] == c["commands_sent"]  # 50 ms period
    assert c["moves"].get("fallback", 0) == 0
    rig = c["rig"]
    assert rig["commands_received"] == c["commands_sent"] and rig["commands_rejected"] == {}
    assert rig["followed_s"] >= 25.0 and rig["checks"] >= 400
    # following the commands, the rig's angle differs from the controller's prediction only by
    # late commands (none inside the servo's limits); flying the script, it would differ by as
    # much as from the script
    assert rig["rms_vs_script_deg"] > 1e-3
    assert rig["rms_vs_controller_deg"] < 0.1 * rig["rms_vs_script_deg"], rig
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
    # --no-controller leaves it out (the same configuration: the reference model is cached)
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "demo", "--duration", "3",
                        "--from", "0", "--headless", "--no-controller", "--json", "--config",
                        str(cfg)], capture_output=True, text=True, timeout=240, cwd=tmp_path)
    assert r.returncode == 0, r.stderr[-2000:]
    s = json.loads(r.stdout)
    assert s["controller"] == {"enabled": False} and s["accepted"] >= 200
    assert "controller" not in r.stderr


def test_scripted_motion_is_the_rigs_own():
    """The controller's lift reference is built on the scenario's scripted pitch programme as
    the demo rebuilds it; it must be the angle the rig flies without commands."""
    from wingwatch.daemon.demo import scripted_motion
    from wingwatch.daemon.rig.scenario import load_scenario, scenario_from_dict
    from wingwatch.daemon.rig.source import VirtualRig

    creep = scenario_from_dict({
        "scenario": {"name": "creep", "description": "random pitching and a creep",
                     "duration_s": 3.0, "seed": 11},
        "motion": {"mean_deg": 4.0, "random": [{"rms_deg": 0.5, "band_hz": [0.1, 2.0],
                                                "components": 16, "taper_s": 0.5}]},
        "events": [{"t_s": 1.0, "kind": "pitch-creep", "rate_deg_per_s": 0.5, "duration_s": 1.5}]})
    for sc in (load_scenario("campaign"), creep):
        frames = []
        for f in VirtualRig(sc).frames():
            frames.append(f)
            if f.t0 >= 2.5:
                break
        t = np.concatenate([f.truth["t"] for f in frames])
        alpha = np.concatenate([f.truth["alpha"] for f in frames])
        a, ad, _ = scripted_motion(sc).evaluate(t)
        np.testing.assert_array_equal(a, alpha)  # the same numbers, not merely close
        assert np.ptp(a) > np.radians(0.2)  # the programme does move
