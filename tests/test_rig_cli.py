"""The ``wingwatch rig`` subcommand: listing, offline log and truth, live publishing, refusals."""

import argparse
import json
import threading

import numpy as np
import pytest
import zmq

from wingwatch.daemon.codec import decode_sensor_frame
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.replaylog import LogReader
from wingwatch.daemon.rig import cli as rig_cli
from wingwatch.daemon.rig.scenario import CHANNELS
from wingwatch.daemon.rig.source import TRUTH_KEYS, VirtualRig


def parse(*argv):
    p = argparse.ArgumentParser()
    rig_cli.configure_parser(p)
    return p.parse_args(list(argv))


def test_list_prints_one_line_per_scenario(capsys):
    assert rig_cli.run(parse("--list")) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    names = [ln.split()[0] for ln in lines]
    assert {"calibration", "campaign", "random-pitch", "stationary", "test-manoeuvre"} <= set(names)
    assert all(len(ln.split(None, 1)) == 2 for ln in lines)


def test_wired_into_the_wingwatch_command(capsys):
    from wingwatch.daemon.cli import main

    assert main(["rig", "--list"]) == 0
    assert "campaign" in capsys.readouterr().out
    assert main(["rig", "--scenario", "nowhere", "--duration", "0.1"]) == 2  # one-sentence refusal


def test_out_log_and_truth_are_deterministic(tmp_path, capsys):
    args = ("--scenario", "calibration", "--duration", "0.5", "--json")
    assert rig_cli.run(parse(*args, "--out", str(tmp_path / "a.wwlog"), "--truth", str(tmp_path / "a"))) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["ingest"]["accepted"] == 50 and summary["ingest"]["rejected"] == 0
    assert rig_cli.run(parse(*args, "--out", str(tmp_path / "b.wwlog"))) == 0
    # same seed, same bytes: the log's receive times come from the source clock
    assert (tmp_path / "a.wwlog").read_bytes() == (tmp_path / "b.wwlog").read_bytes()
    # the log holds exactly the rig's frames
    rig = VirtualRig("calibration", duration_s=0.5)
    want = np.concatenate([f.samples for f in rig.frames()])
    got = []
    for rec in LogReader.open(tmp_path / "a.wwlog"):
        if rec.topic.startswith(b"sensor"):
            got.append(decode_sensor_frame(rec.topic, rec.payload).samples)
    np.testing.assert_array_equal(np.concatenate(got), want)
    # the truth: arrays of every sample plus the events file
    npz, js = rig_cli.truth_paths(tmp_path / "a")
    data = np.load(npz)
    assert set(TRUTH_KEYS) | {"seq", "emitted"} <= set(data.files)
    assert data["t"].shape == (500,) and data["emitted"].all()
    meta = json.loads(js.read_text())
    assert meta["scenario"] == "calibration" and meta["channels"] == list(CHANNELS)
    assert meta["seed"] == 11 and meta["events"] == []


def test_truth_alone_runs_offline_and_keeps_lost_frames(tmp_path, capsys):
    scen = tmp_path / "lost.toml"
    scen.write_text('[scenario]\nname = "lost"\ndescription = "d"\nduration_s = 0.3\n'
                    '[numerics]\nn_panels = 8\n'
                    '[[events]]\nt_s = 0.1\nkind = "lost-frames"\ncount = 2\n')
    assert rig_cli.run(parse("--scenario", str(scen), "--truth", str(tmp_path / "t.npz"), "--json")) == 0
    summary = json.loads(capsys.readouterr().out)
    assert "endpoint" not in summary and "log" not in summary
    data = np.load(tmp_path / "t.npz")
    assert (~data["emitted"]).sum() == 20  # two frames of 10 samples, simulated but not sent
    meta = json.loads((tmp_path / "t.events.json").read_text())
    assert meta["lost_seqs"] == [10, 11] and meta["events"][0]["kind"] == "lost-frames"


def test_refusals_before_anything_runs(tmp_path):
    with pytest.raises(ConfigError, match="unknown scenario"):
        rig_cli.run(parse("--scenario", "nowhere"))
    with pytest.raises(ConfigError, match="too large"):
        rig_cli.run(parse("--scenario", "calibration", "--rate", "30", "--out", str(tmp_path / "x.wwlog")))
    assert not (tmp_path / "x.wwlog").exists()


def test_live_mode_publishes_paced_frames():
    ctx = zmq.Context()
    sub = ctx.socket(zmq.SUB)
    sub.setsockopt(zmq.LINGER, 0)
    sub.setsockopt(zmq.SUBSCRIBE, b"")
    port = sub.bind_to_random_port("tcp://127.0.0.1")
    args = parse("--scenario", "stationary", "--duration", "0.2", "--endpoint", f"tcp://127.0.0.1:{port}")
    out = {}
    th = threading.Thread(target=lambda: out.setdefault("rc", rig_cli.run(args)))
    th.start()
    got = []
    try:
        while len(got) < 20 and sub.poll(5000):
            got.append(decode_sensor_frame(*sub.recv_multipart()))
    finally:
        th.join(20)
        sub.close()
        ctx.term()
    assert out.get("rc") == 0
    assert [f.seq for f in got] == list(range(20))
    assert got[0].channels == CHANNELS and got[0].rate == 1000.0
    want = np.concatenate([f.samples for f in VirtualRig("stationary", duration_s=0.2).frames()])
    np.testing.assert_array_equal(np.concatenate([f.samples for f in got]), want)


@pytest.mark.parametrize("name, frames", [("calibration", 2500), ("test-manoeuvre", 1800)])
def test_shipped_replay_logs_are_the_scenarios(name, frames):
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "replay_logs" / f"rig-{name}.wwlog"
    reader = LogReader.open(path)
    got = [decode_sensor_frame(r.topic, r.payload) for r in reader if r.topic.startswith(b"sensor")]
    assert not reader.damage and len(got) == frames
    assert [f.seq for f in got] == list(range(frames))
    # the log's first half second is the rig's first half second (regenerated here; a different
    # numpy/BLAS build may change the last bit of a reduction, hence rtol 1e-12, not equality)
    want = np.concatenate([f.samples for f in VirtualRig(name, duration_s=0.5).frames()])
    np.testing.assert_allclose(np.concatenate([f.samples for f in got[:50]]), want, rtol=1e-12, atol=1e-12)


def test_a_strip_the_configuration_does_not_read_is_named(tmp_path, capsys):
    """The stiff-strip scenario's 1.5 mm strip with the shipped 0.6 mm configuration: the
    curvature a daemon would compute is 2.5 times the strip's (kappa = 2 eps / t); said once."""
    assert rig_cli.run(parse("--scenario", "stiff-strip", "--duration", "0.1",
                             "--out", str(tmp_path / "a.wwlog"))) == 0
    err = capsys.readouterr().err
    assert "1.5 mm strip" in err and "thickness_m = 0.0006" in err and "2.5 times" in err
    cfg = tmp_path / "strip.toml"
    cfg.write_text("[outputs.curvature]\nthickness_m = 0.0015\n")
    assert rig_cli.run(parse("--scenario", "stiff-strip", "--duration", "0.1", "--config",
                             str(cfg), "--out", str(tmp_path / "b.wwlog"))) == 0
    assert "note:" not in capsys.readouterr().err
