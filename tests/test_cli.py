"""The command line as a user meets it: help, clear one-sentence errors, JSON output."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib

import pytest


def ww(*args, timeout=60):
    return subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", *args],
                          capture_output=True, text=True, timeout=timeout)


def test_help_lists_the_subcommands_and_the_caution():
    r = ww("--help")
    assert r.returncode == 0
    for name in ("run", "rig", "monitor", "calibrate", "replay", "inspect", "demo", "keys"):
        assert name in r.stdout
    assert "advisory" in r.stdout


def test_print_config_is_valid_toml():
    r = ww("run", "--print-config")
    assert r.returncode == 0
    cfg = tomllib.loads(r.stdout)
    assert cfg["endpoints"]["sensor"].startswith("tcp://127.0.0.1:")


def test_bad_config_is_one_sentence_without_traceback(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[outputs.curvature]\nthickness_m = -1.0\n")
    r = ww("run", "--config", str(p))
    assert r.returncode == 2
    assert "Traceback" not in r.stderr
    assert str(p) in r.stderr and "outputs.curvature.thickness_m" in r.stderr
    r = ww("--debug", "run", "--config", str(p))
    assert r.returncode != 0 and "Traceback" in r.stderr


def test_inspect_missing_and_not_a_log(tmp_path):
    r = ww("inspect", str(tmp_path / "none.wwlog"))
    assert r.returncode == 2 and "not found" in r.stderr and "Traceback" not in r.stderr
    junk = tmp_path / "junk.wwlog"
    junk.write_bytes(b"hello")
    r = ww("inspect", str(junk), "--json")
    assert r.returncode == 2 and "not a wingwatch replay log" in r.stderr
    assert r.stdout == ""


def test_inspect_human_and_json_agree(tmp_path):
    import numpy as np

    from wingwatch.daemon.codec import SensorFrame, encode_sensor_frame
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.service import record_frames

    cfg = load_config()
    ch = cfg.streams["rig"].channels
    msgs = [(*encode_sensor_frame(SensorFrame("rig", i, i / 100, 1000.0, ch, np.ones((10, 5)))),
             i / 100) for i in (0, 1, 2, 2, 5)]
    record_frames(msgs, cfg, tmp_path / "x.wwlog")
    r = ww("inspect", str(tmp_path / "x.wwlog"), "--json")
    s = json.loads(r.stdout)
    assert (s["frames"], s["accepted"], s["duplicates"], s["gaps"], s["missing_frames"]) == (5, 4, 1, 1, 2)
    h = ww("inspect", str(tmp_path / "x.wwlog"))
    assert h.returncode == 0 and "1 (2 frames missing)" in h.stdout


def _placeholders():
    from wingwatch.daemon.cli import build_parser

    sub = next(a for a in build_parser()._actions if a.dest == "command")
    return [n for n, p in sub.choices.items() if getattr(p.get_default("func"), "placeholder", False)]


@pytest.mark.parametrize("name", _placeholders())
def test_unbuilt_subcommands_say_so(name):
    r = ww(name)
    assert r.returncode == 2 and "not yet available" in r.stderr
