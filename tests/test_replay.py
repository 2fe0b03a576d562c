"""Replay: same log and configuration give the same decision outputs, byte for byte; a changed
configuration is caught by --compare at the first divergence; windows and digests."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame
from wingwatch.daemon.config import load_config
from wingwatch.daemon.replay import compare_outputs, recorded_outputs, replay_log
from wingwatch.daemon.service import record_frames


@pytest.fixture
def gappy_log(tmp_path):
    cfg = load_config()
    ch = cfg.streams["rig"].channels
    msgs = []
    for i in range(200):
        if i % 50 == 49:  # lose a frame every 50: an event each time
            continue
        f = SensorFrame("rig", i, i / 100, 1000.0, ch, np.full((10, 5), float(i)))
        msgs.append((*encode_sensor_frame(f), f.t_end))
    msgs.append((b"sensor.rig", b"\x00junk", 3.0))
    path = tmp_path / "gappy.wwlog"
    record_frames(msgs, cfg, path)
    return path


def test_replay_reproduces_recorded_outputs(gappy_log):
    rec = recorded_outputs(gappy_log)
    assert len(rec) == 3  # three gap events, recorded as the daemon made them
    a = replay_log(gappy_log)
    b = replay_log(gappy_log)
    assert compare_outputs(rec, a.outputs) is None
    assert a.output_digest == b.output_digest
    assert [o.payload for o in a.outputs] == [o.payload for o in rec]
    assert a.samples == 1960 and a.counters["rejected"] == 1
    # one record at a time and in batches of 7 (a gap or rejection inside a batch): the same
    one = replay_log(gappy_log, batch=1)
    seven = replay_log(gappy_log, batch=7)
    assert [o.payload for o in one.outputs] == [o.payload for o in a.outputs]
    assert [o.payload for o in seven.outputs] == [o.payload for o in a.outputs]
    assert one.counters == seven.counters == a.counters


def test_changed_configuration_diverges_at_first_event(gappy_log, tmp_path):
    cfg_file = tmp_path / "c.toml"
    # Declare the stream at another rate: every frame is now refused, no events are made.
    cfg_file.write_text("[streams.rig]\nrate_hz = 500.0\nchannels = ['pitch_enc', 'balance_lift', "
                        "'q_pitot', 'strain_root', 'strain_mid']\n")
    res = replay_log(gappy_log, config=load_config(cfg_file))
    div = compare_outputs(recorded_outputs(gappy_log), res.outputs)
    assert div is not None and div.index == 0 and div.field == "<presence>"
    assert div.t == pytest.approx(0.50)
    assert res.counters["rejected_by_reason"]["rate_mismatch"] == 196


def test_window_starts_fresh(gappy_log):
    res = replay_log(gappy_log, t_from=1.0, t_to=1.6)
    assert res.samples == 600 - 10  # frames 100..159 less the lost frame 149
    assert len(res.outputs) == 1


def test_cli_replay_json_and_compare(gappy_log):
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "replay", str(gappy_log),
                        "--fast", "--compare", "--json"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    for key in ("realtime_factor", "samples", "models_published", "models_rejected", "warnings",
                "final", "output_digest"):
        assert key in s
    assert s["compare"]["identical"] is True
    assert s["output_digest"] == replay_log(gappy_log).output_digest
