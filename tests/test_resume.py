"""Restart after SIGKILL: the log reads to the last complete frame, the run continues in a new
segment, and identification resumes from the last checkpoint, not from scratch."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

from conftest import write_config
from test_identifier import frames, motion, outputs
from wingwatch.clients.publisher import FramePublisher
from wingwatch.daemon.checkpoint import read_checkpoint
from wingwatch.daemon.codec import decode_message
from wingwatch.daemon.config import load_config
from wingwatch.daemon.replaylog import KIND_MODEL, LogReader


def _start(args, cwd):
    return subprocess.Popen([sys.executable, "-m", "wingwatch.daemon.cli", "run", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, cwd=cwd)


def test_sigkill_then_resume_from_checkpoint(tmp_path, zctx):
    cfg_path = write_config(tmp_path, "checkpoint_s = 0.5\n")  # in [recorder]
    cfg = load_config(cfg_path)
    alpha, ad, add = motion(60000, bandwidth=5.0)
    msgs = list(frames(alpha, outputs(alpha, ad, add), noise=1e-3))
    proc = _start(["--config", str(cfg_path), "--duration", "120"], tmp_path)
    pub = FramePublisher(cfg.endpoints.sensor, channels=cfg.streams["rig"].channels,
                         rate_hz=1000.0, context=zctx)
    run_dir = None
    try:
        assert pub.wait_ready(20.0)
        for i, (topic, payload) in enumerate(msgs[:3500]):  # 35 s of data, as fast as it goes
            pub.send_raw(topic, payload)
            if i % 200 == 0:
                time.sleep(0.05)  # let the daemon keep up (it processes ~5x real time)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            runs = list((tmp_path / "logs").glob("ww-*"))
            ck = runs[0] / "checkpoint.wwstate" if runs else None
            if ck is not None and ck.exists():
                st = read_checkpoint(ck)
                if st["t_sample"] is not None and st["t_sample"] > 30.0:
                    run_dir = runs[0]
                    break
            time.sleep(0.2)
        assert run_dir is not None, "no checkpoint past 30 s of data"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(10)
        before = read_checkpoint(run_dir)
        ident_before = before["state"]["stages"][0]
        assert ident_before["candidate_seq"] >= 5 and ident_before["in_service"] is not None
        # the killed run reads back to its last complete frame, no corrupt record
        r = LogReader.open(run_dir)
        recs = list(r)
        assert recs and not r.corrupt
        proc = _start(["--resume", str(run_dir), "--duration", "60"], tmp_path)
        pub.close()
        pub = FramePublisher(cfg.endpoints.sensor, channels=cfg.streams["rig"].channels,
                             rate_hz=1000.0, context=zctx, start_seq=4000, t0=40.0)
        assert pub.wait_ready(20.0)
        for topic, payload in msgs[4000:4600]:  # 6 s more
            pub.send_raw(topic, payload)
            time.sleep(0.002)
        time.sleep(3.0)
        proc.send_signal(signal.SIGINT)
        proc.wait(30)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(10)
        pub.close()
    segs = sorted(run_dir.glob("segment-*.wwlog"))
    assert len(segs) == 2  # the run continued in a new segment of the same folder
    hdr = LogReader.open(segs[1]).header
    assert hdr.get("resumed_from_checkpoint") is True and hdr["run_id"] == run_dir.name
    models = [decode_message(x.payload) for x in LogReader.open(segs[1]) if x.kind == KIND_MODEL]
    # candidates continue the killed daemon's numbering: identification did not start over
    assert models and min(m["seq"] for m in models) > ident_before["candidate_seq"]
    assert all(m["status"] != "reference" for m in models)  # no cold announcement again
    after = read_checkpoint(run_dir)["state"]["stages"][0]
    assert after["samples"] > ident_before["samples"]  # the fast layer carried on
