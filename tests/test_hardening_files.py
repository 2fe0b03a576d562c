"""Hardening: bad configuration and model files are refused before anything starts, each with
one sentence naming the file and the key or field; the command line exits 2 with no traceback.
Also the access-control checks the hardening issue adds: a non-loopback bind without keys, and
no pickle/eval/exec anywhere in the package."""

from __future__ import annotations

import dataclasses
import json
import logging
import math
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from conftest import write_config
from wingwatch.daemon import cli
from wingwatch.daemon.config import load_config
from wingwatch.daemon.errors import ConfigError, ModelFileError
from wingwatch.daemon.modelfile import ReferenceModel, load_model, save_model
from wingwatch.daemon.service import check_binds

ROOT = Path(__file__).resolve().parents[1]


def _one_sentence(msg: str) -> None:
    assert "\n" not in msg.strip() and "Traceback" not in msg
    assert msg.strip().endswith((".", ")")), msg


# ----------------------------------------------------------------------------------------------
# Configuration files through `wingwatch run --config`

BAD_CONFIGS = {
    "truncated": ("[endpoints]\nsensor = \"tcp://127.0.0.1:1", "not valid TOML"),
    "unknown_key": ("[status]\nperiod_s = 1.0\nperiod = 2.0\n", "status.period"),
    "unknown_table": ("[monitorz]\nx = 1\n", "monitorz"),
    "wrong_type": ("[limits]\nmax_channels = \"many\"\n", "limits.max_channels"),
    "nan": ("[status]\nperiod_s = nan\n", "status.period_s"),
    "negative": ("[recorder]\nrotate_mb = -1.0\n", "recorder.rotate_mb"),
    "bad_endpoint": ("[endpoints]\nsensor = \"udp://127.0.0.1:5\"\n", "endpoints.sensor"),
    "channels_not_list": ("[streams.rig]\nrate_hz = 1000.0\nchannels = \"pitch_enc\"\n",
                          "streams.rig.channels"),
    "missing_channel": ("[outputs]\nalpha = \"nowhere\"\n", "outputs.alpha"),
    "zero_gain": ("[channels.pitch_enc]\nquantity = \"angle\"\nunits = \"deg\"\ngain = 0.0\n"
                  "offset = 0.0\n", "channels.pitch_enc"),
    "not_utf8": (b"\xff\xfe[status]\n", "cannot read"),
}


@pytest.mark.parametrize("name", sorted(BAD_CONFIGS))
def test_bad_configuration_is_refused_with_exit_2_naming_file_and_key(name, tmp_path, capsys):
    text, key = BAD_CONFIGS[name]
    p = tmp_path / f"{name}.toml"
    p.write_bytes(text if isinstance(text, bytes) else text.encode())
    with pytest.raises(ConfigError) as exc:
        load_config(p)
    msg = str(exc.value)
    assert str(p) in msg and key in msg, msg
    _one_sentence(msg)
    code = cli.main(["run", "--config", str(p), "--duration", "0.1", "--no-record"])
    err = capsys.readouterr().err
    assert code == 2
    assert str(p) in " ".join(err.split()) and "Traceback" not in err


def test_refusal_from_a_real_process_has_no_traceback(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text("[limits]\nmax_frame_samples = 1.5\n")
    r = subprocess.run([sys.executable, "-m", "wingwatch.daemon.cli", "run", "--config", str(p)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "Traceback" not in r.stderr and "limits.max_frame_samples" in r.stderr
    assert r.stdout == ""


def test_payload_limit_beyond_what_the_log_can_hold_is_refused(tmp_path):
    with pytest.raises(ConfigError, match="limits.max_payload_bytes"):
        load_config(write_config(tmp_path, "[limits]\nmax_payload_bytes = 1073741824\n"))


# ----------------------------------------------------------------------------------------------
# Model files through load_model


def _model() -> dict:
    r = 2
    m = ReferenceModel(
        dt=1e-3, A=np.diag([0.9, 0.5]), B=np.ones((r, 1)), C=np.eye(2), k_qs=np.array([5.8, 1.2]),
        k_rate=np.array([0.1, 0.0]), k_am=np.array([0.01, 0.0]), bias=np.zeros(2),
        sd={k: np.full(2, 0.01) for k in ("quasi_steady", "rate", "added_mass", "bias")},
        operating_point={"alpha_rad": 0.0, "lift": 0.0, "curvature": 0.0},
        hankel_sv=np.array([1.0, 0.5]), errors_by_rank={2: {"lift": 0.01, "curvature": 0.02}},
        extra={"provenance": {"log": "x.wwlog"}})
    return m.as_dict()


def _write(tmp_path: Path, d: dict | str, name="model.json") -> Path:
    p = tmp_path / name
    p.write_text(d if isinstance(d, str) else json.dumps(d))  # json writes NaN as NaN
    return p


def _mutate(**kw):
    d = _model()
    for path, value in kw.items():
        keys = path.split("__")
        node = d
        for k in keys[:-1]:
            node = node[k]
        if value is KeyError:
            del node[keys[-1]]
        else:
            node[keys[-1]] = value
    return d


BAD_MODELS = {
    "wrong_format": (_mutate(format="something-else"), "'format'"),
    "wrong_version": (_mutate(version=2), "version 2"),
    "version_as_text": (_mutate(version="1"), "version '1'"),
    "rank_text": (_mutate(rank="2"), "'rank'"),
    "dt_negative": (_mutate(dt=-1e-3), "'dt'"),
    "A_shape": (_mutate(A=[[0.9, 0.0, 0.0], [0.0, 0.5, 0.0]]), "'A' has shape"),
    "B_shape": (_mutate(B=[1.0, 1.0]), "'B' has shape"),
    "C_ragged": (_mutate(C=[[1.0, 0.0], [1.0]]), "'C'"),
    "A_nan": (_mutate(A=[[math.nan, 0.0], [0.0, 0.5]]), "'A' holds NaN"),
    "C_inf": (_mutate(C=[[math.inf, 0.0], [0.0, 1.0]]), "'C' holds NaN"),
    "A_unstable": (_mutate(A=[[1.01, 0.0], [0.0, 0.5]]), "'A' is unstable"),
    "A_text": (_mutate(A="eye"), "'A'"),
    "A_missing": (_mutate(A=KeyError), "'A' is missing"),
    "coef_text": (_mutate(coefficients__quasi_steady__lift="5.8"), "'coefficients.quasi_steady.lift'"),
    "coef_nan": (_mutate(coefficients__rate__curvature=math.nan), "'coefficients.rate.curvature'"),
    "coef_missing": (_mutate(coefficients__added_mass=KeyError), "'coefficients.added_mass'"),
    "sd_bool": (_mutate(uncertainty__bias__lift=True), "'uncertainty.bias.lift'"),
    "op_missing": (_mutate(operating_point={"alpha_rad": 0.0}), "'operating_point'"),
}


@pytest.mark.parametrize("name", sorted(BAD_MODELS))
def test_bad_model_file_is_refused_naming_the_file_and_field(name, tmp_path):
    d, field = BAD_MODELS[name]
    p = _write(tmp_path, d)
    with pytest.raises(ModelFileError) as exc:
        load_model(p)
    msg = str(exc.value)
    assert msg.startswith(str(p)) and field in msg, msg
    _one_sentence(msg)


@pytest.mark.parametrize("cut", [0, 1, 10, 100, -2])
def test_truncated_model_file_is_refused(cut, tmp_path):
    good = save_model(load_model(_write(tmp_path, _model(), "full.json")), tmp_path / "ok.json")
    text = good.read_text()
    p = _write(tmp_path, text[:cut] if cut >= 0 else text[:len(text) + cut - 10])
    with pytest.raises(ModelFileError, match=re.escape(str(p))) as exc:
        load_model(p)
    assert "truncated" in str(exc.value) or "not a complete JSON" in str(exc.value)


def test_the_valid_model_loads_and_round_trips(tmp_path):
    m = load_model(_write(tmp_path, _model()))  # the base of every mutation above is good
    assert m.rank == 2 and np.array_equal(m.A, np.diag([0.9, 0.5]))
    again = load_model(save_model(m, tmp_path / "again.json"))
    assert again.as_dict() == m.as_dict()


BAD_MODELS_NOT_REFUSED = {
    "unknown_key": (_mutate(Aa=[[1.0]]), "'Aa'",
                    "modelfile.load_model keeps any unknown top-level key in 'extra' instead of "
                    "refusing it; a misspelt key is silently ignored"),
    "op_nan": (_mutate(operating_point={"alpha_rad": math.nan, "lift": 0.0, "curvature": 0.0}),
               "'operating_point", "modelfile.load_model checks operating_point values with "
               "isinstance(int, float) only: NaN, infinity and true pass"),
    "hankel_text": (_mutate(hankel_sv=["big"]), "'hankel_sv'",
                    "modelfile.load_model converts hankel_sv with np.array(dtype=float) unguarded: "
                    "a plain ValueError escapes (traceback), not a ModelFileError"),
    "errors_list": (_mutate(errors_by_rank=[1, 2]), "'errors_by_rank'",
                    "modelfile.load_model calls .items() on errors_by_rank outside its try: a list "
                    "raises AttributeError (traceback), not a ModelFileError"),
    "input_wrong": (_mutate(input="alpha"), "'input'",
                    "modelfile.load_model never checks 'input' (must be alpha_dot) or 'outputs'"),
}


@pytest.mark.parametrize("name", [
    pytest.param(k) for k, v in sorted(BAD_MODELS_NOT_REFUSED.items())])
def test_model_file_faults_now_refused(name, tmp_path):
    d, field, _ = BAD_MODELS_NOT_REFUSED[name]
    p = _write(tmp_path, d)
    with pytest.raises(ModelFileError) as exc:
        load_model(p)
    assert str(p) in str(exc.value) and field in str(exc.value)


# ----------------------------------------------------------------------------------------------
# Access control additions


def test_non_loopback_bind_without_keys_needs_insecure_and_is_logged_loudly(cfg, caplog):
    wide = dataclasses.replace(cfg, endpoints=dataclasses.replace(
        cfg.endpoints, publish="tcp://0.0.0.0:5602"))
    with pytest.raises(ConfigError) as exc:
        check_binds(wide, insecure=False)
    assert "endpoints.publish" in str(exc.value) and "--insecure" in str(exc.value)
    with caplog.at_level(logging.WARNING, logger="wingwatch.daemon"):
        check_binds(wide, insecure=True)
    loud = [r for r in caplog.records if r.levelno >= logging.WARNING]
    assert len(loud) == 1
    line = loud[0].getMessage()
    assert line.startswith("INSECURE") and "endpoints.publish" in line and "0.0.0.0" in line
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="wingwatch.daemon"):
        check_binds(cfg, insecure=True)  # loopback: nothing to warn about
    assert not caplog.records


def test_cli_refuses_a_non_loopback_bind_without_insecure(tmp_path, capsys):
    p = write_config(tmp_path)
    text = p.read_text().replace('sensor = "tcp://127.0.0.1:', 'sensor = "tcp://0.0.0.0:')
    p.write_text(text)
    assert cli.main(["run", "--config", str(p), "--no-record", "--duration", "0.1"]) == 2
    err = " ".join(capsys.readouterr().err.split())
    assert "--insecure" in err and "endpoints.sensor" in err and "Traceback" not in err


_FORBIDDEN = re.compile(
    r"^\s*(import|from)\s+(pickle|cPickle|dill|shelve|marshal|joblib)\b"
    r"|\bpickle\.|\bmarshal\.loads?\b|(?<![\w.])(eval|exec)\s*\("
    r"|allow_pickle\s*=\s*True|\byaml\.load\s*\(|\bcompile\s*\([^)]*['\"]exec['\"]"
    r"|__import__\s*\(",
    re.M)


def test_no_pickle_eval_or_exec_in_the_package():
    files = sorted(p for d in ("daemon", "clients", "benchmarks") for p in (ROOT / d).rglob("*.py"))
    assert len(files) > 20
    hits = []
    for p in files:
        for i, line in enumerate(p.read_text("utf-8").splitlines(), 1):
            if _FORBIDDEN.search(line):
                hits.append(f"{p.relative_to(ROOT)}:{i}: {line.strip()}")
    assert hits == []
    # the pattern itself works (it would be vacuous otherwise)
    for bad in ("import pickle", "x = eval(s)", "exec(code)", "np.load(f, allow_pickle=True)",
                "pickle.loads(b)", "from marshal import loads"):
        assert _FORBIDDEN.search(bad), bad
    for fine in ("self.execute(x)", "evaluate(x)", "# no pickle anywhere", "ok.exec_time"):
        assert not _FORBIDDEN.search(fine), fine
