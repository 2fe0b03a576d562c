"""Configuration loading and validation: every refusal names the file and the key."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from wingwatch.daemon.config import config_from_dict, load_config, to_toml
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.service import check_binds

REPO = Path(__file__).resolve().parents[1]


def _load(tmp_path: Path, text: str):
    p = tmp_path / "user.toml"
    p.write_text(text)
    return load_config(p)


def test_shipped_default_is_the_repo_file():
    # The packaged default must be the file in configs/ (package-dir mapping), not a copy.
    cfg = load_config(REPO / "configs" / "wingwatch.toml")
    assert cfg.as_dict() == load_config().as_dict()


def test_user_file_overrides_only_what_it_gives(tmp_path):
    cfg = _load(tmp_path, "[recorder]\nrotate_mb = 8.0\n")
    assert cfg.recorder.rotate_mb == 8.0
    assert cfg.recorder.fsync_interval_s == load_config().recorder.fsync_interval_s
    assert cfg.source == str(tmp_path / "user.toml")


@pytest.mark.parametrize(
    "text, key",
    [
        ("[recorder]\nrotate_mbb = 1.0\n", "recorder.rotate_mbb"),
        ("[recordr]\n", "recordr"),
        ("[recorder]\nrotate_mb = 'big'\n", "recorder.rotate_mb"),
        ("[recorder]\nenabled = 1\n", "recorder.enabled"),
        ("[outputs.lift]\nreference_area_m2 = -0.1\n", "outputs.lift.reference_area_m2"),
        ("[outputs.curvature]\nthickness_m = 0.0\n", "outputs.curvature.thickness_m"),
        ("[outputs.curvature]\nstrain = 'strain_tip'\n", "outputs.curvature.strain"),
        ("[outputs]\nalpha = 'balance_lift'\n", "outputs.alpha"),
        ("[status]\nperiod_s = nan\n", "status.period_s"),
        ("[limits]\nmax_channels = 2.5\n", "limits.max_channels"),
        ("[endpoints]\nsensor = 'udp://127.0.0.1:1'\n", "endpoints.sensor"),
        ("[endpoints]\nsensor = 'tcp://127.0.0.1'\n", "endpoints.sensor"),
        ("[channels.pitch_enc]\nquantity = 'angle'\nunits = 'deg'\ngain = 0.0\noffset = 0.0\n",
         "channels.pitch_enc.gain"),
        ("[streams.rig]\nrate_hz = -5.0\nchannels = ['a']\n", "streams.rig.rate_hz"),
        ("[streams.rig]\nrate_hz = 1000.0\nchannels = ['a', 'a']\n", "streams.rig.channels"),
    ],
)
def test_bad_values_name_file_and_key(tmp_path, text, key):
    with pytest.raises(ConfigError) as exc:
        _load(tmp_path, text)
    msg = str(exc.value)
    assert "user.toml" in msg and f"'{key}'" in msg, msg
    assert "\n" not in msg  # one sentence, one line


def test_missing_channel_in_stream_is_refused(tmp_path):
    # The stream no longer carries strain_mid, which [channels] still maps.
    text = ("[streams.rig]\nrate_hz = 1000.0\n"
            "channels = ['pitch_enc', 'balance_lift', 'q_pitot', 'strain_root']\n")
    with pytest.raises(ConfigError, match="channels.strain_mid"):
        _load(tmp_path, text)


def test_not_toml_and_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="not valid TOML"):
        _load(tmp_path, "[recorder\n")
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "nope.toml")


def test_print_config_round_trips():
    cfg = load_config()
    again = config_from_dict(tomllib.loads(to_toml(cfg)))
    assert again.as_dict() == cfg.as_dict()


def test_non_loopback_bind_needs_insecure(tmp_path):
    cfg = _load(tmp_path, "[endpoints]\nsensor = 'tcp://0.0.0.0:5601'\n")
    with pytest.raises(ConfigError, match="endpoints.sensor.*--insecure"):
        check_binds(cfg, insecure=False)
    check_binds(cfg, insecure=True)  # allowed, logged


def test_pyproject_lists_every_package_folder():
    # pyproject lists packages explicitly (package-dir mapping); a new folder must be added.
    py = tomllib.loads((REPO / "pyproject.toml").read_text())
    listed = set(py["tool"]["setuptools"]["packages"])
    found = set()
    for top, ns in (("daemon", "wingwatch.daemon"), ("clients", "wingwatch.clients"),
                    ("configs", "wingwatch.configs")):
        for init in (REPO / top).rglob("__init__.py"):
            rel = init.parent.relative_to(REPO / top).parts
            found.add(".".join((ns, *rel)))
    assert found == listed
