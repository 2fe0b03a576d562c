"""Warning lifecycle: levels, hysteresis and minimum dwell, as explicit raise/update/clear events.

Every warning is advisory. A condition is reported to :class:`WarningBook` at each evaluation
with the level it currently deserves (None: fine). The book turns that into events:

- ``raised`` when a condition first reaches a level;
- ``updated`` when its level changes (up at once; down only after ``dwell_s`` at the lower
  level, so a noisy signal does not chatter);
- ``cleared`` when it has deserved no level for ``dwell_s`` of sample time.

Levels, in increasing urgency: ``advisory``, ``caution``, ``limit`` (our naming).

Examples
--------
>>> book = WarningBook(dwell_s=1.0)
>>> [e.body["event"] for e in book.report("k:q", "kind", "q", "caution", 2.0, 1.0, 0.0, "M1", "m")]
['raised']
>>> book.report("k:q", "kind", "q", None, 0.5, 1.0, 0.5, "M1", "m")
[]
>>> [e.body["event"] for e in book.report("k:q", "kind", "q", None, 0.5, 1.0, 1.6, "M1", "m")]
['cleared']
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from wingwatch.daemon.pipeline import ADVISORY, Output

__all__ = ["LEVELS", "WarningBook"]

LEVELS = ("advisory", "caution", "limit")
_RANK = {None: 0, "advisory": 1, "caution": 2, "limit": 3}


@dataclass
class _Live:
    level: str
    since_lower: float | None  # sample time the condition first deserved a lower level
    lower_level: str | None
    raised_t: float


class WarningBook:
    """The live warnings and their events (explicit state; deterministic in sample time)."""

    def __init__(self, dwell_s: float = 2.0) -> None:
        if dwell_s < 0:
            raise ValueError("dwell_s must not be negative")
        self.dwell_s = float(dwell_s)
        self.reset()

    def reset(self) -> None:
        self.live: dict[str, _Live] = {}
        self.events = 0

    def report(self, wid: str, kind: str, quantity: str, level: str | None, value: float,
               threshold: float, t: float, model_id: str, message: str) -> list[Output]:
        """Report a condition's current level; returns the events it causes (maybe none)."""
        if level not in _RANK:
            raise ValueError(f"unknown warning level {level!r}")
        cur = self.live.get(wid)
        out: list[Output] = []

        def event(name: str, lvl: str) -> Output:
            self.events += 1
            return Output("warning", {
                "warning_id": wid, "event": name, "level": lvl, "warning_kind": kind,
                "quantity": quantity, "value": float(value), "threshold": float(threshold),
                "t": float(t), "model_id": model_id, "message": message, "advisory": ADVISORY,
            })

        if cur is None:
            if level is not None:
                self.live[wid] = _Live(level, None, None, t)
                out.append(event("raised", level))
            return out
        if _RANK[level] > _RANK[cur.level]:
            cur.level = level
            cur.since_lower = None
            cur.lower_level = None
            out.append(event("updated", level))
        elif _RANK[level] < _RANK[cur.level]:
            if cur.since_lower is None or cur.lower_level != level:
                cur.since_lower = t if cur.since_lower is None else cur.since_lower
                cur.lower_level = level
            if t - cur.since_lower >= self.dwell_s:
                if level is None:
                    del self.live[wid]
                    out.append(event("cleared", cur.level))
                else:
                    cur.level = level
                    cur.since_lower = None
                    cur.lower_level = None
                    out.append(event("updated", level))
        else:
            cur.since_lower = None
            cur.lower_level = None
        return out

    def state_dict(self) -> dict[str, Any]:
        return {"live": {k: [v.level, v.since_lower, v.lower_level, v.raised_t]
                         for k, v in self.live.items()}, "events": self.events}

    def load_state_dict(self, st: dict[str, Any]) -> None:
        self.live = {k: _Live(v[0], v[1], v[2], v[3]) for k, v in st["live"].items()}
        self.events = int(st["events"])
