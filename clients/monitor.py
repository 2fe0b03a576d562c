"""The terminal monitor: one screen a test engineer reads at a glance during a run or a replay.

``wingwatch monitor`` subscribes to the daemon's ``ww.`` topics (status, model, warning, watch,
event), asks the snapshot socket for the model in service and the active warnings, and redraws
a fixed layout several times a second::

    header      source time, model in service and its age in source time
    link        heartbeat age, rates, lag, ingest counters, messages missed, recorder
    margin      curvature margin gauge, predicted minimum, time to limit, allowable alpha
    coefficients quasi-steady / rate / added-mass for C_L and curvature: reference, current,
                95 % interval, change from reference, drift state
    modes       tracked modes: frequency and damping with trend arrows, drift state
    trends      sparklines of the quasi-steady lift coefficient, mode-1 frequency, margin
    warnings    active advisory warnings (level, age in source time, message), a rejected
                candidate model with its reason
    caution     the advisory caution, always on screen

The code is cut in three: :class:`MonitorState` (pure state: ``apply(kind, msg)`` with decoded
messages, bounded history only), :func:`render` (pure: the same state and ``now`` give the
same text) and the live loop (:func:`run`), which polls the sockets with timeouts and never
blocks on the network. Nothing here decides anything: the monitor shows what the daemon
published, and every warning it shows is advisory.
"""

from __future__ import annotations

import argparse
import math
import time
from collections import deque
from typing import Any, Iterable

from rich.console import Console, Group, RenderableType
from rich.rule import Rule
from rich.table import Table
from rich.text import Text

__all__ = [
    "MonitorState",
    "render",
    "sparkline",
    "trend_arrow",
    "gauge",
    "fmt_num",
    "fmt_change",
    "listen",
    "configure_parser",
    "run",
]

#: The three interpretable coefficient columns, in display order, with their screen names.
COEFFICIENTS = (("quasi_steady", "quasi-steady"), ("rate", "rate"), ("added_mass", "added-mass"))
#: The two outputs, with their screen names.
OUTPUTS = (("lift", "C_L"), ("curvature", "κ"))
#: Warning levels, in increasing urgency (protocol: ``ww.warning``).
LEVELS = ("advisory", "caution", "limit")

# Our own palette: calm slate for structure, green for nominal, amber for attention, a filled
# red band for anything the engineer must see from across the room.
_S = {
    "title": "bold sky_blue2",
    "rule": "grey42",
    "dim": "grey58",
    "ok": "spring_green3",
    "attn": "orange1",
    "loud": "bold white on red3",
    "alarm": "bold red3",
    "value": "bold",
    "advisory": "khaki1",
    "caution": "bold orange1",
    "limit": "bold white on red3",
    "caution_text": "italic khaki1",
}

_SPARK = "▁▂▃▄▅▆▇█"


# --------------------------------------------------------------------------------------------
# small pure helpers


def _finite(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def fmt_num(x: Any, digits: int = 4) -> str:
    """A number in at most about nine characters; a dash when there is none.

    >>> fmt_num(5.03125), fmt_num(0.0001234), fmt_num(None), fmt_num(-12.0), fmt_num(0.0)
    ('5.031', '1.23e-04', '—', '-12', '0')
    """
    if not _finite(x):
        return "—"
    if x == 0:
        return "0"
    if 1e-3 <= abs(x) < 1e5:
        return f"{x:.{digits}g}"
    return f"{x:.{max(1, digits - 2)}e}"


def fmt_change(cur: float, ref: float, interval: Any = None) -> str:
    """The change of a coefficient from its reference: in per cent, or as a signed difference
    when a percentage says nothing (a reference closer to zero than the current interval's
    half-width, or a change of ten times the reference or more).

    >>> fmt_change(2.2, 2.0), fmt_change(-0.044, -9.37e-05, [-0.06, -0.028])
    ('+10.0%', 'Δ-0.0439')
    >>> fmt_change(1.0, 0.0), fmt_change(50.0, 1.0)
    ('Δ+1', 'Δ+49')
    """
    d = cur - ref
    half = None
    if (isinstance(interval, (list, tuple)) and len(interval) == 2
            and all(_finite(v) for v in interval)):
        half = 0.5 * abs(interval[1] - interval[0])
    if ref == 0 or (half is not None and abs(ref) < half) or abs(d) >= 10 * abs(ref):
        return "Δ" + ("+" if d >= 0 else "") + fmt_num(d, 3)
    return f"{d / abs(ref) * 100:+.1f}%"


def sparkline(values: Iterable[float], width: int) -> str:
    """The last ``width`` values as a row of unicode blocks, low to high (min..max of those).

    Non-finite values show as a blank; a flat series sits at mid height.

    >>> sparkline([0, 1, 2, 3, 4, 5, 6, 7], 8)
    '▁▂▃▄▅▆▇█'
    >>> sparkline([2.0, 2.0, 2.0], 5)
    '▄▄▄'
    >>> sparkline([1, float("nan"), 3], 3)
    '▁ █'
    """
    vals = list(values)[-width:] if width > 0 else []
    fin = [v for v in vals if _finite(v)]
    if not fin:
        return ""
    lo, hi = min(fin), max(fin)
    out = []
    for v in vals:
        if not _finite(v):
            out.append(" ")
        elif hi - lo <= 1e-12 * max(1.0, abs(hi)):
            out.append(_SPARK[3])
        else:
            out.append(_SPARK[min(7, int((v - lo) / (hi - lo) * 7 + 0.5))])
    return "".join(out)


def trend_arrow(values: Iterable[float], rel_tol: float = 0.002, abs_tol: float = 0.0) -> str:
    """Direction of a short history: ``↑`` rising, ``↓`` falling, ``→`` level, ``·`` too short.

    The change is the least-squares slope over the samples times their span; it counts when it
    exceeds ``rel_tol`` of the mean magnitude (and ``abs_tol``).

    >>> trend_arrow([10.0, 10.1, 10.3]), trend_arrow([10.0, 9.8]), trend_arrow([5.0, 5.001]), trend_arrow([1.0])
    ('↑', '↓', '→', '·')
    """
    v = [x for x in values if _finite(x)]
    n = len(v)
    if n < 2:
        return "·"
    xm = (n - 1) / 2
    ym = sum(v) / n
    sxx = sum((i - xm) ** 2 for i in range(n))
    slope = sum((i - xm) * (y - ym) for i, y in enumerate(v)) / sxx
    change = slope * (n - 1)
    tol = max(rel_tol * abs(ym), abs_tol)
    if change > tol:
        return "↑"
    if change < -tol:
        return "↓"
    return "→"


def gauge(fraction: Any, width: int) -> str:
    """A bar of ``width`` cells filled to ``fraction`` (clipped to 0..1), eighth-cell steps.

    >>> gauge(0.5, 8), gauge(1.2, 4), gauge(-0.3, 4), gauge(0.0625, 4)
    ('████░░░░', '████', '░░░░', '▎░░░')
    """
    if width <= 0:
        return ""
    if not _finite(fraction):
        return "?" * width
    f = min(1.0, max(0.0, float(fraction)))
    eighths = int(round(f * width * 8))
    full, part = divmod(eighths, 8)
    out = "█" * full
    if part and full < width:
        out += " ▏▎▍▌▋▊▉"[part]
    return out + "░" * (width - len(out))


def _age(seconds: Any) -> str:
    if not _finite(seconds):
        return "—"
    s = float(seconds)
    if abs(s) < 100:
        return f"{s:.1f} s"
    if abs(s) < 6000:
        return f"{s / 60:.1f} min"
    return f"{s / 3600:.1f} h"


def _uptime(seconds: Any) -> str:
    if not _finite(seconds):
        return "—"
    s = int(seconds)
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


def _bytes(n: Any) -> str:
    if not _finite(n):
        return "—"
    for unit, k in (("GB", 1 << 30), ("MB", 1 << 20), ("kB", 1 << 10)):
        if n >= k:
            return f"{n / k:.1f} {unit}"
    return f"{int(n)} B"


def _level_rank(level: Any) -> int:
    return LEVELS.index(level) if level in LEVELS else -1


def _line(*parts: tuple[str, str] | str) -> Text:
    t = Text(no_wrap=True, overflow="ellipsis")
    for p in parts:
        if isinstance(p, str):
            t.append(p)
        else:
            t.append(p[0], style=p[1])
    return t


# --------------------------------------------------------------------------------------------
# state


class MonitorState:
    """What the monitor knows: the latest of each message kind and short bounded histories.

    Parameters
    ----------
    history : int
        Points kept for each trend line and trend arrow (``deque(maxlen=history)``).
    lost_after : float
        Heartbeat periods without a status message before the link shows as lost.
    endpoint : str, optional
        Where the monitor listens (shown while waiting).

    Examples
    --------
    >>> s = MonitorState()
    >>> s.apply("status", {"kind": "status", "pub_seq": 0, "t_wall": 100.0, "t_sample": 2.0})
    >>> s.apply("status", {"kind": "status", "pub_seq": 3, "t_wall": 101.0, "t_sample": 3.0})
    >>> s.missed, s.source_t, s.link(now=101.5)
    (2, 3.0, 'up')
    """

    def __init__(self, history: int = 60, lost_after: float = 3.0, endpoint: str | None = None) -> None:
        if history < 2:
            raise ValueError("history must be at least 2")
        if lost_after <= 0:
            raise ValueError("lost_after must be positive")
        self.history = int(history)
        self.lost_after = float(lost_after)
        self.endpoint = endpoint
        self.reset()

    def reset(self) -> None:
        self.messages = 0
        self.by_kind: dict[str, int] = {}
        self.missed = 0
        self._last_pub_seq: dict[str, int] = {}
        self.status: dict[str, Any] | None = None
        self.status_received: float | None = None
        self.model: dict[str, Any] | None = None  # in service: accepted or reference
        self.rejected: dict[str, Any] | None = None  # the newest rejected candidate
        self.models_accepted = 0
        self.models_rejected = 0
        self.watch: dict[str, Any] | None = None
        self.warnings: dict[str, dict[str, Any]] = {}  # active: raised/updated, not cleared
        self.warnings_cleared = 0
        self._warning_last_t: dict[str, float] = {}
        self.events: deque[dict[str, Any]] = deque(maxlen=8)
        self.event_counts: dict[str, int] = {}
        self.source_t: float | None = None
        self.trend_qs_lift: deque[float] = deque(maxlen=self.history)
        self.trend_margin: deque[float] = deque(maxlen=self.history)
        self.mode_freq: dict[int, deque[float]] = {}
        self.mode_damping: dict[int, deque[float]] = {}

    # -- intake -------------------------------------------------------------------------------
    def apply(self, kind: str, msg: dict[str, Any], *, received: float | None = None,
              snapshot: bool = False) -> None:
        """Take one decoded outbound message of ``kind``.

        ``received`` is the UNIX time it arrived (defaults to the status message's own
        ``t_wall``); ``snapshot`` marks a message from the snapshot reply, which is older than
        the live stream: it neither counts toward ``missed`` nor replaces newer state.
        """
        if not isinstance(msg, dict):
            return
        self.messages += 1
        self.by_kind[kind] = self.by_kind.get(kind, 0) + 1
        if not snapshot:
            self._count_missed(kind, msg)
        handler = getattr(self, f"_on_{kind}", None)
        if handler is not None:
            handler(msg, received, snapshot)

    def _count_missed(self, kind: str, m: dict[str, Any]) -> None:
        from wingwatch.clients.feed import count_missed

        self.missed += count_missed(self._last_pub_seq, kind, m)

    def _see_t(self, t: Any) -> None:
        if _finite(t) and (self.source_t is None or t > self.source_t):
            self.source_t = float(t)

    def _on_status(self, m: dict[str, Any], received: float | None, snapshot: bool) -> None:
        if snapshot and self.status is not None:
            return
        self.status = m
        rx = received if _finite(received) else m.get("t_wall")
        self.status_received = float(rx) if _finite(rx) else None
        self._see_t(m.get("t_sample"))

    def _on_model(self, m: dict[str, Any], received: float | None, snapshot: bool) -> None:
        self._see_t(m.get("t"))
        status = m.get("status")
        seq = m.get("seq", -1)
        if status == "rejected":
            self.models_rejected += 1
            if self.rejected is None or seq >= self.rejected.get("seq", -1):
                self.rejected = m
            return
        if status not in ("accepted", "reference"):
            return
        if self.model is not None and seq <= self.model.get("seq", -1) and snapshot:
            return  # the snapshot is older than what the live stream already gave
        if self.model is not None and m.get("model_id") == self.model.get("model_id"):
            return  # snapshot and live stream delivered the same model
        if not snapshot:
            self.models_accepted += 1
        self.model = m
        qs = (m.get("coefficients") or {}).get("quasi_steady") or {}
        if _finite(qs.get("lift")):
            self.trend_qs_lift.append(float(qs["lift"]))
        for mode in m.get("modes") or []:
            mid = mode.get("id")
            if not isinstance(mid, int):
                continue
            self.mode_freq.setdefault(mid, deque(maxlen=self.history)).append(
                float(mode["freq_hz"]) if _finite(mode.get("freq_hz")) else float("nan"))
            self.mode_damping.setdefault(mid, deque(maxlen=self.history)).append(
                float(mode["damping"]) if _finite(mode.get("damping")) else float("nan"))

    def _on_warning(self, m: dict[str, Any], received: float | None, snapshot: bool) -> None:
        self._see_t(m.get("t"))
        wid = str(m.get("warning_id", ""))
        t = m.get("t") if _finite(m.get("t")) else float("-inf")
        if snapshot and wid in self._warning_last_t and t <= self._warning_last_t[wid]:
            return  # the live stream already told us something newer about this warning
        self._warning_last_t[wid] = max(t, self._warning_last_t.get(wid, float("-inf")))
        if m.get("event") == "cleared":
            if self.warnings.pop(wid, None) is not None:
                self.warnings_cleared += 1
        else:
            self.warnings[wid] = m

    def _on_watch(self, m: dict[str, Any], received: float | None, snapshot: bool) -> None:
        self._see_t(m.get("t"))
        if self.watch is not None and _finite(self.watch.get("t")) and _finite(m.get("t")) \
                and m["t"] < self.watch["t"]:
            return
        self.watch = m
        now = (m.get("margin") or {}).get("now")
        if _finite(now):
            self.trend_margin.append(float(now))

    def _on_event(self, m: dict[str, Any], received: float | None, snapshot: bool) -> None:
        self._see_t(m.get("t"))
        self.events.append(m)
        ev = str(m.get("event", "?"))
        self.event_counts[ev] = self.event_counts.get(ev, 0) + 1

    # -- derived ------------------------------------------------------------------------------
    def heartbeat_age(self, now: float) -> float | None:
        """Wall seconds since the newest status heartbeat (None before the first)."""
        if self.status_received is None:
            return None
        return max(0.0, now - self.status_received)

    def link(self, now: float) -> str:
        """``waiting`` (nothing yet), ``outputs_only`` (outputs but no heartbeat, as from a
        replay), ``up``, ``lost`` (no heartbeat for ``lost_after`` periods) or ``stopped``
        (the daemon's final heartbeat)."""
        if self.status is None:
            return "outputs_only" if self.messages else "waiting"
        if self.status.get("final"):
            return "stopped"
        period = self.status.get("period_s")
        period = float(period) if _finite(period) and period > 0 else 1.0
        age = self.heartbeat_age(now)
        if age is not None and age > self.lost_after * period:
            return "lost"
        return "up"

    def active_warnings(self) -> list[dict[str, Any]]:
        """Active warnings, most urgent first, then newest first."""
        return sorted(self.warnings.values(),
                      key=lambda w: (-_level_rank(w.get("level")),
                                     -(w["t"] if _finite(w.get("t")) else float("-inf")),
                                     str(w.get("warning_id", ""))))

    @property
    def running_cold(self) -> bool:
        """A model is in service but there is no reference to compare it with."""
        return (self.model is not None and self.model.get("status") != "reference"
                and not self.model.get("reference"))

    def reference(self) -> dict[str, Any]:
        if self.model is None:
            return {}
        if self.model.get("status") == "reference":
            return dict(self.model.get("coefficients") or {})
        return dict(self.model.get("reference") or {})


# --------------------------------------------------------------------------------------------
# rendering


def _rule(title: str | Text) -> Rule:
    t = title if isinstance(title, Text) else Text(title, style=_S["title"])
    return Rule(t, align="left", style=_S["rule"], characters="─")


def _header(state: MonitorState, now: float) -> Text:
    t = _line(("wingwatch monitor", _S["title"]))
    t.append("  t ", style=_S["dim"])
    t.append(f"{state.source_t:.2f} s" if state.source_t is not None else "—", style=_S["value"])
    m = state.model
    t.append("  model ", style=_S["dim"])
    if m is None:
        t.append("none yet", style=_S["attn"])
    else:
        t.append(str(m.get("model_id", "?")), style=_S["value"])
        t.append(f" {m.get('status', '?')}")
        if state.source_t is not None and _finite(m.get("t")):
            t.append(f", {_age(state.source_t - m['t'])} old", style=_S["dim"])
    if state.status and _finite(state.status.get("uptime_s")):
        t.append("  up ", style=_S["dim"])
        t.append(_uptime(state.status["uptime_s"]))
    return t


def _link_lines(state: MonitorState, now: float) -> list[Text]:
    link = state.link(now)
    st = state.status or {}
    age = state.heartbeat_age(now)
    if link == "up":
        first = _line(("LINK UP", _S["ok"]), f" heartbeat {_age(age)} ago")
    elif link == "lost":
        first = _line((" LINK LOST ", _S["loud"]), f" no heartbeat for {_age(age)}")
    elif link == "stopped":
        first = _line((" DAEMON STOPPED ", _S["loud"]), " final heartbeat received")
    elif link == "outputs_only":
        first = _line(("NO HEARTBEAT", _S["attn"]), " outputs only (a replay?)")
    else:
        first = _line(("WAITING", _S["attn"]), " for the daemon's first message")
    lines = [first]
    rates = st.get("rates") or {}
    lag = st.get("lag_s")
    if state.status is not None:
        first.append(", lag ", style=_S["dim"])
        first.append(f"{lag:.2f} s" if _finite(lag) else "—",
                     style=_S["attn"] if _finite(lag) and lag > 1.0 else "")
    second = _line()
    if state.status is None and state.endpoint:
        second.append("listening on ", style=_S["dim"])
        second.append(state.endpoint)
    else:
        second.append(f"{fmt_num(rates.get('samples_per_s'), 4)} samples/s  "
                      f"{fmt_num(rates.get('frames_per_s'), 3)} frames/s")
    lines.append(second)
    c = dict(st.get("counters") or {})
    if state.status is None and state.event_counts:  # a replay: count the published events
        c["gaps"] = state.event_counts.get("gap", 0) + state.event_counts.get("time_gap", 0)
    third = _line()
    for label, key in (("gaps", "gaps"), ("dup", "duplicates"), ("rejected", "rejected")):
        v = c.get(key)
        third.append(f"{label} ", style=_S["dim"])
        third.append(str(v) if isinstance(v, int) else "—",
                     style=_S["attn"] if isinstance(v, int) and v > 0 else "")
        third.append("  ")
    third.append("missed ", style=_S["dim"])
    third.append(str(state.missed), style=_S["attn"] if state.missed else "")
    lines.append(third)
    rec = st.get("recorder")
    if rec and rec.get("failing"):
        err = rec.get("last_error") or "writes failing"
        fourth = _line((" RECORDER FAILING ", _S["loud"]), f" {err}")
    elif rec:
        fourth = _line(("recording", _S["ok"]),
                       f" {_bytes(rec.get('bytes'))}, {rec.get('segments', '?')} seg")
        if rec.get("dropped_records"):
            fourth.append(f", {rec['dropped_records']} dropped", style=_S["attn"])
    elif state.status is not None:
        fourth = _line(("not recording", _S["dim"]))
    else:
        fourth = _line(("recorder —", _S["dim"]))
    sensors = ((state.watch or {}).get("sensors") or {})
    bad = [f"{ch} {s.get('state')}" for ch, s in sensors.items()
           if isinstance(s, dict) and s.get("state") not in (None, "ok")]
    if bad:
        fourth.append("  sensors: ", style=_S["dim"])
        fourth.append(", ".join(bad), style=_S["attn"])
    lines.append(fourth)
    return lines


def _margin_lines(state: MonitorState, width: int) -> list[Text]:
    mg = (state.watch or {}).get("margin")
    if not mg:
        return [_line(("no margin yet", _S["dim"]), " (waiting for the watcher)")]
    now = mg.get("now")
    style = _S["ok"]
    if not _finite(now) or now < 0.5:
        style = _S["attn"]
    if _finite(now) and now < 0.2:
        style = _S["limit"]
    bar_w = max(8, width - 13)
    first = _line((gauge(now, bar_w), _S["alarm"] if style == _S["limit"] else style))
    first.append(f" {now * 100:5.1f} % left" if _finite(now) else "     ? % left", style=_S["value"])
    lines = [first]
    pm = mg.get("predicted_min")
    horizon = mg.get("horizon_s")
    sec = _line(("limit ", _S["dim"]), f"{fmt_num(mg.get('limit'))} 1/m  ",
                ("predicted min ", _S["dim"]))
    sec.append(f"{pm * 100:.1f} %" if _finite(pm) else "—",
               style=_S["attn"] if _finite(pm) and pm < 0.5 else "")
    lines.append(sec)
    ttl = mg.get("time_to_limit_s")
    third = _line(("time to limit ", _S["dim"]))
    if _finite(ttl):
        third.append(_age(ttl), style=_S["limit"] if ttl < 5 else _S["attn"])
    else:
        third.append(f"none within {_age(horizon)}" if _finite(horizon) else "none in horizon",
                     style=_S["ok"])
    lines.append(third)
    aa = mg.get("allowable_alpha_deg")
    fourth = _line(("allowable α ", _S["dim"]), f"{fmt_num(aa, 3)}°" if _finite(aa) else "—")
    src = mg.get("source")
    if src:
        fourth.append(f"  ({'controller plan' if src == 'plan' else 'alpha held'})", style=_S["dim"])
    lines.append(fourth)
    return lines


def _drift_cell(drift: dict[str, Any] | None, warning: dict[str, Any] | None,
                compact: bool = False) -> Text:
    t = _line()
    if compact and warning:
        drift = None  # the warning's level says more than the statistic in a narrow cell
    if drift and compact:
        cs, h = drift.get("cusum"), drift.get("threshold")
        if _finite(cs) and _finite(h) and h > 0:
            frac = cs / h
            word = "steady" if frac < 0.5 else ("rising" if frac < 1 else "DRIFT")
            t.append(word, style=_S["ok"] if frac < 0.5 else _S["attn"])
    elif drift:
        z, cs, h = drift.get("z"), drift.get("cusum"), drift.get("threshold")
        frac = cs / h if _finite(cs) and _finite(h) and h > 0 else None
        t.append(f"z{z:+5.1f} " if _finite(z) else "z    — ", style=_S["dim"])
        if frac is not None:
            state_style = _S["ok"] if frac < 0.5 else (_S["attn"] if frac < 1 else _S["limit"])
            t.append(gauge(frac, 5), style=_S["alarm"] if state_style == _S["limit"] else state_style)
            word = "steady" if frac < 0.5 else ("rising" if frac < 1 else "DRIFT")
            t.append(f" {word}", style=state_style)
    if warning:
        lvl = str(warning.get("level", "?"))
        t.append(f" {lvl.upper()}" if t.plain else lvl.upper(), style=_S.get(lvl, _S["attn"]))
    if not t.plain:
        t.append("—", style=_S["dim"])
    return t


def _warning_for(state: MonitorState, quantity: str) -> dict[str, Any] | None:
    best = None
    for w in state.warnings.values():
        if w.get("quantity") == quantity and (best is None or
                                              _level_rank(w.get("level")) > _level_rank(best.get("level"))):
            best = w
    return best


def _interval_text(iv: Any, cur: Any) -> str:
    if not (isinstance(iv, (list, tuple)) and len(iv) == 2 and all(_finite(v) for v in iv)):
        return "—"
    lo, hi = float(iv[0]), float(iv[1])
    if _finite(cur) and abs((hi - cur) - (cur - lo)) <= 1e-6 * max(abs(hi - lo), 1e-300):
        return f"±{fmt_num((hi - lo) / 2, 2)}"
    return f"{fmt_num(lo, 3)}…{fmt_num(hi, 3)}"


def _coefficient_block(state: MonitorState, width: int) -> list[RenderableType]:
    m = state.model
    title = Text("coefficients", style=_S["title"])
    if m is not None:
        title.append(f"  {m.get('model_id', '?')}", style=_S["value"])
        fit = m.get("fit") or {}
        if fit:
            title.append("  fit ", style=_S["dim"])
            title.append(" ".join(f"{lab} {fit[k] * 100:.1f}%" for k, lab in OUTPUTS
                                  if _finite(fit.get(k))))
        stale = (state.watch or {}).get("stale") or {}
        if _finite(stale.get("statistic")) and _finite(stale.get("threshold")):
            over = stale["statistic"] >= stale["threshold"]
            title.append("  residual ", style=_S["dim"])
            title.append(f"{stale['statistic']:.2f}/{stale['threshold']:.2f}",
                         style=_S["attn"] if over else "")
        if state.running_cold:
            title.append("  running cold (no reference)", style=_S["attn"])
    out: list[RenderableType] = [_rule(title)]
    if m is None:
        if state.rejected is not None:
            out.append(_line(("no model in service yet", _S["attn"]),
                             f": {state.models_rejected} candidate(s) rejected, see below"))
        else:
            out.append(_line(("no model yet", _S["attn"]),
                             " (waiting for the reference or the first identified model)"))
        return out
    coefs = m.get("coefficients") or {}
    ivs = m.get("intervals") or {}
    ref = state.reference()
    drift = (state.watch or {}).get("drift") or {}
    wide = width >= 100
    tab = Table(box=None, padding=(0, 1, 0, 0), pad_edge=False, show_edge=False, expand=False,
                header_style=_S["dim"])
    tab.add_column("", no_wrap=True, min_width=12)
    tab.add_column("", no_wrap=True, min_width=3)
    for name, w in (("reference", 9 if wide else 8), ("current", 8), ("±95 %", 8), ("change", 6)):
        tab.add_column(name if wide or name != "reference" else "ref", justify="right",
                       no_wrap=True, min_width=w)
    tab.add_column("drift", no_wrap=True, overflow="ellipsis", min_width=12)
    for key, label in COEFFICIENTS:
        for j, (out_key, out_label) in enumerate(OUTPUTS):
            cur = (coefs.get(key) or {}).get(out_key)
            r = (ref.get(key) or {}).get(out_key)
            iv = (ivs.get(key) or {}).get(out_key)
            change = Text("—", style=_S["dim"])
            if _finite(cur) and _finite(r):
                outside = (isinstance(iv, (list, tuple)) and len(iv) == 2
                           and all(_finite(v) for v in iv) and not (iv[0] <= r <= iv[1]))
                change = Text(fmt_change(cur, r, iv), style=_S["attn"] if outside else "")
            q = f"{key}.{out_key}"
            tab.add_row(label if j == 0 else "", out_label,
                        Text(fmt_num(r), style=_S["dim"]), Text(fmt_num(cur), style=_S["value"]),
                        _interval_text(iv, cur), change,
                        _drift_cell(drift.get(q), _warning_for(state, q)))
    out.append(tab)
    return out


def _mode_lines(state: MonitorState, rows: int) -> list[Text]:
    modes = list((state.model or {}).get("modes") or [])
    if not modes:
        return [_line(("no tracked modes yet", _S["dim"]))]
    modes.sort(key=lambda md: md.get("id", 0) if isinstance(md.get("id"), int) else 0)
    drift = (state.watch or {}).get("drift") or {}
    lines = []
    for md in modes[:rows]:
        mid = md.get("id")
        f, z = md.get("freq_hz"), md.get("damping")
        fa = trend_arrow(state.mode_freq.get(mid, ()), rel_tol=0.002)
        za = trend_arrow(state.mode_damping.get(mid, ()), rel_tol=0.02, abs_tol=1e-4)
        t = _line((f"{mid:>2} ", _S["dim"]))
        t.append(f"{f:7.2f} Hz " if _finite(f) else "      — Hz ", style=_S["value"])
        t.append(fa, style=_S["attn"] if fa in "↑↓" else _S["dim"])
        t.append("  ζ ", style=_S["dim"])
        t.append(f"{z * 100:5.2f} % " if _finite(z) else "    — % ",
                 style=_S["attn"] if _finite(z) and z < 0.005 else "")
        # damping falling is the one that matters (toward instability)
        t.append(za, style=_S["alarm"] if za == "↓" else _S["dim"])
        d = drift.get(f"mode{mid}.freq_hz")
        w = _warning_for(state, f"mode{mid}.freq_hz") or _warning_for(state, f"mode{mid}.damping")
        if d or w:
            t.append(" ")
            t.append_text(_drift_cell(d, w, compact=True))
        lines.append(t)
    if len(modes) > rows:
        lines[-1].append(f"  +{len(modes) - rows} more", style=_S["dim"])
    return lines


def _trend_lines(state: MonitorState, width: int) -> list[Text]:
    first_mode = min(state.mode_freq) if state.mode_freq else None
    series = (
        ("C_L/α", state.trend_qs_lift, lambda v: fmt_num(v)),
        (f"f{first_mode if first_mode is not None else 1} Hz",
         state.mode_freq.get(first_mode, deque()) if first_mode is not None else deque(),
         lambda v: fmt_num(v)),
        ("margin", state.trend_margin, lambda v: f"{v * 100:.1f}%"),
    )
    spark_w = max(6, width - 17)
    lines = []
    for label, vals, f in series:
        t = _line((f"{label:<7}", _S["dim"]))
        sp = sparkline(vals, spark_w)
        t.append(f"{sp:<{spark_w}}", style="sky_blue2")
        t.append(f" {f(vals[-1])}" if vals and _finite(vals[-1]) else " —")
        lines.append(t)
    return lines


def _warning_lines(state: MonitorState, rows: int, width: int) -> list[Text]:
    lines: list[Text] = []
    rej = state.rejected
    if rej is not None and (state.model is None or rej.get("seq", -1) > state.model.get("seq", -1)):
        t = _line(("REJECTED ", _S["attn"]), (f"{rej.get('model_id', '?')} ", _S["value"]))
        reason = rej.get("reason") or "no reason given"
        t.append(f"{reason} (the previous model stays in service)")
        lines.append(t)
    active = state.active_warnings()
    room = max(0, rows - len(lines))
    for i, w in enumerate(active[:room]):
        if i == room - 1 and len(active) > room:
            lines.append(_line((f"… {len(active) - room + 1} more active warnings "
                                "(most urgent shown first)", _S["dim"])))
            break
        lvl = str(w.get("level", "?"))
        t = _line((f"{lvl.upper():<8}", _S.get(lvl, _S["attn"])), " ")
        t_src = state.source_t
        age = (t_src - w["t"]) if t_src is not None and _finite(w.get("t")) else None
        t.append(f"{_age(age):>7} ", style=_S["dim"])
        msg = w.get("message") or f"{w.get('warning_kind', '?')} {w.get('quantity', '')}".strip()
        t.append(str(msg))
        lines.append(t)
    if not lines:
        lines.append(_line(("none active", _S["ok"]),
                           (f"  ({state.warnings_cleared} cleared this session)"
                            if state.warnings_cleared else "", _S["dim"])))
    return lines


def _event_line(e: dict[str, Any]) -> Text:
    ev = str(e.get("event", "?"))
    t = _line((f"{ev:<9}", _S["attn"] if ev == "restart" else _S["dim"]))
    t.append(f"t {e['t']:.3f} s" if _finite(e.get("t")) else "t —")
    t.append(f"  stream {e.get('stream', '?')}  seq {e.get('seq', '?')}", style=_S["dim"])
    if ev == "gap" and e.get("missing_frames"):
        t.append(f"  {e['missing_frames']} frame(s) missing")
    elif ev == "time_gap" and _finite(e.get("missing_s")):
        t.append(f"  {e['missing_s']:.3f} s missing")
    return t


def _caution() -> Text:
    from wingwatch.daemon.pipeline import ADVISORY  # the daemon's own words (one source)

    t = Text(overflow="fold")
    t.append(ADVISORY, style=_S["caution_text"])
    return t


def render(state: MonitorState, width: int | None = None, now: float | None = None,
           height: int | None = None) -> RenderableType:
    """One frame of the monitor for ``state`` (pure: same state and ``now``, same text).

    Parameters
    ----------
    width : int, optional
        Terminal columns (default 80); the layout is meant for 80 and widens gracefully.
    now : float, optional
        UNIX time used for the heartbeat age (default: the clock).
    height : int, optional
        Terminal rows (default 24); spare rows go to modes and warnings.
    """
    width = max(60, int(width or 80))
    height = max(24, int(height or 24))
    now = time.time() if now is None else float(now)
    spare = height - 24
    left_w = (width - 2) // 2
    right_w = width - 2 - left_w

    top = Table.grid(padding=(0, 2), expand=False)
    top.add_column(width=left_w, no_wrap=True)
    top.add_column(width=right_w, no_wrap=True)
    top.add_row(_rule("link"), _rule("curvature margin"))
    link, margin = _link_lines(state, now), _margin_lines(state, right_w)
    for i in range(max(len(link), len(margin))):
        top.add_row(link[i] if i < len(link) else "", margin[i] if i < len(margin) else "")

    events_block: list[RenderableType] = []
    if spare >= 4 and state.events:
        shown = list(state.events)[-min(3, spare - 2):]
        events_block = [_rule(Text.assemble(("events", _S["title"]),
                                            (f"  {sum(state.event_counts.values())} this session",
                                             _S["dim"])))]
        events_block += [_event_line(e) for e in reversed(shown)]
        spare -= len(events_block)
    mode_rows = 3 + max(0, spare // 3)
    mid = Table.grid(padding=(0, 2), expand=False)
    mid.add_column(width=left_w, no_wrap=True)
    mid.add_column(width=right_w, no_wrap=True)
    mid.add_row(_rule(Text.assemble(("modes", _S["title"]), ("  f, damping ζ", _S["dim"]))),
                _rule("trends"))
    modes, trends = _mode_lines(state, mode_rows), _trend_lines(state, right_w)
    for i in range(max(len(modes), len(trends))):
        mid.add_row(modes[i] if i < len(modes) else "", trends[i] if i < len(trends) else "")

    n_warn = len(state.warnings)
    warn_title = Text.assemble(("warnings", _S["title"]),
                               (f"  {n_warn} active (advisory)" if n_warn else "  (advisory)",
                                _S["dim"]))
    warn_rows = 3 + max(0, spare - spare // 3)
    parts: list[RenderableType] = [
        _header(state, now),
        top,
        *_coefficient_block(state, width),
        mid,
        _rule(warn_title),
        *_warning_lines(state, warn_rows, width),
        *events_block,
        _caution(),
    ]
    outer = Table.grid(expand=False)
    outer.add_column(width=width, no_wrap=False)
    outer.add_row(Group(*parts))
    return outer


# --------------------------------------------------------------------------------------------
# live loop


def _make_feed(state: MonitorState, publish: str, snapshot: str | None, *, context: Any = None,
               curve: dict | None = None) -> Any:
    """A feed (clients/feed.py machinery: SUB with heartbeats, snapshot REQ with retry) that
    hands every ``ww.`` message to ``state``."""
    import msgpack

    from wingwatch.clients.feed import _Feed
    from wingwatch.daemon.codec import decode_message

    class MonitorFeed(_Feed):
        def __init__(self) -> None:
            self.state = state
            self.snapshot_seen = False
            self.live_heartbeats = 0
            super().__init__(publish, snapshot, topics=(b"ww.",), context=context, curve=curve)

        def _apply_snapshot(self, m: dict[str, Any]) -> None:
            self.snapshot_seen = True
            rx = time.time()
            if m.get("status") is not None:
                self.state.apply("status", decode_message(msgpack.packb(m["status"])),
                                 received=rx, snapshot=True)
            if m.get("model") is not None:
                self.state.apply("model", decode_message(msgpack.packb(m["model"])),
                                 received=rx, snapshot=True)
            for w in m.get("warnings") or []:
                self.state.apply("warning", decode_message(msgpack.packb(w)), received=rx,
                                 snapshot=True)

        def _on_message(self, kind: str, m: dict[str, Any], now: float) -> None:
            super()._on_message(kind, m, now)
            if kind == "status":
                self.live_heartbeats += 1
            self.state.apply(kind, m, received=time.time())

    return MonitorFeed()


def listen(publish: str, snapshot: str | None = None, *, seconds: float = 2.0,
           state: MonitorState | None = None, context: Any = None, curve: dict | None = None
           ) -> MonitorState:
    """Listen for up to ``seconds`` (less once a live heartbeat and the snapshot reply are in)
    and return the state: what ``wingwatch monitor --once`` renders.

    The live heartbeat, not the snapshot's copy of the last one, ends the wait: it was made
    after the monitor joined, so its counters are current."""
    state = state or MonitorState(endpoint=publish)
    feed = _make_feed(state, publish, snapshot, context=context, curve=curve)
    try:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            feed.poll(min(0.05, max(0.0, deadline - time.monotonic())))
            if feed.live_heartbeats and (snapshot is None or feed.snapshot_seen):
                feed.poll(0.0)
                break
    finally:
        feed.close()
    return state


def configure_parser(parser: argparse.ArgumentParser) -> None:
    """Options of ``wingwatch monitor``."""
    parser.add_argument("--config", metavar="FILE", help="configuration file (TOML) whose "
                        "endpoints to use (default: the shipped configuration)")
    parser.add_argument("--publish", metavar="EP", help="the daemon's publish endpoint "
                        "(default: endpoints.publish)")
    parser.add_argument("--snapshot", metavar="EP", help="the daemon's snapshot endpoint "
                        "(default: endpoints.snapshot; 'none' for a replay, which has none)")
    parser.add_argument("--refresh", type=float, default=5.0, metavar="HZ",
                        help="screen refreshes per second (default 5)")
    parser.add_argument("--once", action="store_true", help="listen up to 2 s, print one frame "
                        "and exit")
    parser.add_argument("--duration", type=float, metavar="S", help="stop after S seconds")
    parser.add_argument("--client-key", metavar="FILE", help="this monitor's CurveZMQ secret key "
                        "(.key_secret), for a daemon with security.curve")
    parser.add_argument("--daemon-key", metavar="FILE", help="the daemon's CurveZMQ public key "
                        "(.key)")


def run(args: argparse.Namespace, console: Console | None = None) -> int:
    """``wingwatch monitor``: follow the daemon (or a published replay) until Ctrl-C."""
    from wingwatch.daemon.config import load_config
    from wingwatch.daemon.errors import ConfigError

    refresh = float(getattr(args, "refresh", 5.0) or 5.0)
    if not (0 < refresh <= 30):
        raise ConfigError("--refresh must be between 0 and 30 refreshes per second.")
    duration = getattr(args, "duration", None)
    if duration is not None and duration <= 0:
        raise ConfigError("--duration must be greater than zero.")
    cfg = load_config(getattr(args, "config", None) or None)
    publish = getattr(args, "publish", None) or cfg.endpoints.publish
    snapshot = getattr(args, "snapshot", None) or cfg.endpoints.snapshot
    if snapshot.lower() == "none":
        snapshot = None
    curve = None
    ck, dk = getattr(args, "client_key", None), getattr(args, "daemon_key", None)
    if ck or dk:
        if not (ck and dk):
            raise ConfigError("--client-key and --daemon-key go together.")
        from wingwatch.daemon.security import client_curve_options

        curve = client_curve_options(ck, dk)
    console = console or Console(highlight=False)
    state = MonitorState(endpoint=publish)
    if getattr(args, "once", False):
        listen(publish, snapshot, seconds=2.0, state=state, curve=curve)
        console.print(render(state, width=console.width, height=console.height))
        return 0

    from rich.live import Live

    feed = _make_feed(state, publish, snapshot, curve=curve)
    period = 1.0 / refresh
    start = time.monotonic()
    try:
        with Live(console=console, screen=True, auto_refresh=False, transient=False,
                  redirect_stdout=False, redirect_stderr=False) as live:
            next_draw = 0.0
            while duration is None or time.monotonic() - start < duration:
                t = time.monotonic()
                if t >= next_draw:
                    live.update(render(state, width=console.width, height=console.height),
                                refresh=True)
                    next_draw = t + period
                feed.poll(max(0.0, min(0.05, next_draw - time.monotonic())))
    except KeyboardInterrupt:
        pass
    finally:
        feed.close()
    return 0
