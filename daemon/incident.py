"""Incident bundles: a self-contained folder around an event, cut from a recorded run.

``wingwatch replay LOG --incident T --window S --out DIR`` writes:

- ``slice.wwlog``: the records whose source time lies in ``[T - S, T + S]`` (frames and plans
  with their raw bytes exactly as recorded, and the outputs recorded then), with the original
  header (configuration and reference model): a valid log that replays on its own;
- ``config.toml``: the configuration the run used;
- ``model_in_service.json``: the model the daemon had in service at ``T`` (from a replay of the
  run up to ``T``);
- ``warnings.json``: the warning events in the window;
- ``report.txt``: a text summary; ``incident.png``: plots of alpha, C_L, curvature with its
  limit, the quasi-steady coefficients with their intervals and the reference, the drift
  statistics with their thresholds and the warnings on the time axis (plotting extra).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from wingwatch.daemon import replaylog as rl
from wingwatch.daemon.codec import decode_message, decode_sensor_frame, peek_sensor_header
from wingwatch.daemon.condition import ChannelMap
from wingwatch.daemon.config import config_from_recorded, to_toml
from wingwatch.daemon.errors import ConfigError
from wingwatch.daemon.recorder import LogWriter

__all__ = ["write_incident"]


def _record_time(rec: rl.Record) -> float | None:
    if rec.kind in (rl.KIND_INBOUND, rl.KIND_REJECTED):
        head = peek_sensor_header(rec.payload)
        t0 = head.get("t0") if head else None
        return float(t0) if isinstance(t0, (int, float)) else None
    if rec.kind == rl.KIND_STATUS:
        return None
    try:
        m = decode_message(rec.payload)
    except Exception:  # a plan or an unreadable output: placed by its neighbours
        return None
    t = m.get("t", m.get("t0"))
    return float(t) if isinstance(t, (int, float)) else None


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, dict):
        return {k: _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def write_incident(log: str | Path, t: float, window: float, out: str | Path) -> dict[str, Any]:
    """Write the bundle for source time ``t`` +- ``window`` into ``out``; returns a summary."""
    from wingwatch.daemon.replay import replay_log

    if window <= 0:
        raise ConfigError("--window must be greater than zero.")
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    reader = rl.LogReader.open(log)
    header = dict(reader.header)
    cfg = config_from_recorded(header["config"], source=f"{log} (recorded configuration)")
    lo, hi = t - window, t + window

    # 1. the slice, raw bytes as recorded
    keep_header = {k: v for k, v in header.items()
                   if k not in ("software", "software_version", "format_version", "run_id",
                                "segment", "created_unix", "created_utc", "host")}
    keep_header["incident_of"] = str(log)
    keep_header["incident_window"] = [lo, hi]
    slice_path = out / "slice.wwlog"
    last_t = None
    n_frames = 0
    with LogWriter(path=slice_path, header=keep_header, start_unix=header.get("created_unix", 0.0)
                   ) as w:
        for rec in reader:
            rt = _record_time(rec)
            if rt is not None:
                last_t = rt
            rt = rt if rt is not None else last_t
            if rt is None or not lo <= rt <= hi or rec.kind == rl.KIND_STATUS:
                continue
            w.append(rec.kind, rec.topic, rec.payload, rec.t_recv, flags=rec.flags, aux=rec.aux)
            n_frames += rec.kind == rl.KIND_INBOUND
    if n_frames == 0:
        raise ConfigError(f"{log}: no frames between {lo:.3f} and {hi:.3f} s of source time; "
                          "choose --incident inside the run.")
    (out / "config.toml").write_text(to_toml(cfg))

    # 2. the model in service at t, the warnings and traces: replay up to the window's end
    res = replay_log(log, t_to=hi)
    models = [decode_message(o.payload) for o in res.outputs if o.kind == rl.KIND_MODEL]
    warns = [decode_message(o.payload) for o in res.outputs if o.kind == rl.KIND_WARNING]
    watch = [decode_message(o.payload) for o in res.outputs if o.kind == rl.KIND_WATCH]
    in_service = None
    for m in models:
        if m["t"] <= t and m.get("status") in ("accepted", "reference"):
            in_service = m
    (out / "model_in_service.json").write_text(json.dumps(_jsonable(in_service), indent=1))
    win_warns = [w for w in warns if lo <= w["t"] <= hi]
    (out / "warnings.json").write_text(json.dumps(_jsonable(win_warns), indent=1))

    # 3. the samples of the window, conditioned
    cmap = ChannelMap(cfg)
    ts, al, cl, ku = [], [], [], []
    for rec in rl.LogReader.open(slice_path):
        if rec.kind != rl.KIND_INBOUND:
            continue
        f = decode_sensor_frame(rec.topic, rec.payload, max_bytes=cfg.limits.max_payload_bytes,
                                max_channels=cfg.limits.max_channels,
                                max_samples=cfg.limits.max_frame_samples)
        if not cmap.accepts(f):
            continue
        b = cmap.apply(f)
        ts.append(b.t)
        al.append(b.alpha)
        cl.append(b.lift)
        ku.append(b.curvature)
    tt = np.concatenate(ts) if ts else np.zeros(0)
    summary = {
        "log": str(log), "t": t, "window_s": window, "out": str(out),
        "frames": n_frames, "samples": int(tt.size),
        "model_in_service": in_service["model_id"] if in_service else None,
        "warnings": [{"t": w["t"], "level": w["level"], "kind": w["warning_kind"],
                      "event": w["event"], "message": w["message"]} for w in win_warns],
        "curvature_max": float(np.nanmax(np.abs(np.concatenate(ku)))) if ku else None,
        "curvature_limit": cfg.outputs.curvature.limit_per_m,
        "plot": None,
    }
    lines = [
        f"wingwatch incident bundle: {log}",
        f"source time {t:.3f} s, window +-{window:.1f} s ({summary['samples']} samples)",
        f"model in service at {t:.3f} s: {summary['model_in_service'] or 'none'}",
        f"largest |curvature| in the window: {summary['curvature_max']:.4g} 1/m "
        f"(limit {summary['curvature_limit']:g})" if summary["curvature_max"] is not None else "",
        "warnings in the window (advisory):",
    ]
    lines += [f"  {w['t']:10.3f} s  {w['event']:8s} {w['level']:9s} {w['kind']}: {w['message']}"
              for w in summary["warnings"]] or ["  none"]
    lines.append("Advisory only: wingwatch is not a safety system; the facility's safety "
                 "procedures and test director decide.")
    (out / "report.txt").write_text("\n".join(x for x in lines if x) + "\n")
    summary["plot"] = _plot(out / "incident.png", tt, al, cl, ku, models, watch, win_warns, t,
                            lo, hi, cfg.outputs.curvature.limit_per_m)
    return summary


def _plot(path: Path, tt, al, cl, ku, models, watch, warns, t, lo, hi, limit) -> str | None:
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return None
    fig, ax = plt.subplots(5, 1, figsize=(10, 12), sharex=True)
    if tt.size:
        ax[0].plot(tt, np.degrees(np.concatenate(al)), "k", lw=0.8)
        ax[1].plot(tt, np.concatenate(cl), "tab:blue", lw=0.8)
        ax[2].plot(tt, np.concatenate(ku), "tab:green", lw=0.8)
    ax[0].set_ylabel("alpha (deg)")
    ax[1].set_ylabel("C_L")
    ax[2].axhline(limit, color="tab:red", ls="--", lw=1, label="limit")
    ax[2].set_ylabel("curvature (1/m)")
    ax[2].legend(loc="upper left", fontsize=8)
    mw = [m for m in models if lo <= m["t"] <= hi and m.get("coefficients")]
    for j, (name, col) in enumerate((("lift", "tab:blue"), ("curvature", "tab:green"))):
        if not mw:
            break
        tm = [m["t"] for m in mw]
        v = [m["coefficients"]["quasi_steady"][name] for m in mw]
        iv = [m.get("intervals", {}).get("quasi_steady", {}).get(name, [x, x]) for m, x in zip(mw, v)]
        ref = mw[-1].get("reference") or {}
        scale = abs(ref.get("quasi_steady", {}).get(name, v[0]) or 1.0)
        ax[3].plot(tm, np.array(v) / scale, "o-", color=col, ms=3, label=f"K_qs {name} / ref")
        ax[3].fill_between(tm, [a / scale for a, _ in iv], [b / scale for _, b in iv], color=col,
                           alpha=0.2)
    ax[3].axhline(1.0, color="grey", lw=0.8)
    ax[3].set_ylabel("coefficient / reference")
    ax[3].legend(loc="upper left", fontsize=8)
    ww = [m for m in watch if lo <= m["t"] <= hi]
    if ww:
        names = sorted({k for m in ww for k, d in m["drift"].items() if d.get("cusum") is not None})
        for k in names:
            ax[4].plot([m["t"] for m in ww], [m["drift"].get(k, {}).get("cusum") or np.nan for m in ww],
                       lw=0.9, label=k)
        h = next((d["threshold"] for m in ww for d in m["drift"].values()), None)
        if h:
            ax[4].axhline(h, color="tab:red", ls="--", lw=1, label="threshold")
        if names:
            ax[4].legend(loc="upper left", fontsize=7, ncol=2)
    ax[4].set_ylabel("CUSUM")
    ax[4].set_xlabel("source time (s)")
    for a in ax:
        a.axvline(t, color="k", ls=":", lw=1)
        for w in warns:
            if w["event"] == "raised":
                a.axvline(w["t"], color={"limit": "red", "caution": "orange"}.get(w["level"], "gold"),
                          lw=0.8, alpha=0.7)
        a.grid(alpha=0.3)
    fig.suptitle(f"incident at {t:.2f} s (warnings marked; advisory only)")
    fig.tight_layout()
    fig.savefig(path, dpi=80)
    plt.close(fig)
    return str(path)
