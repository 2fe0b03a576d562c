"""Project exceptions: one error policy for the whole of wingwatch.

Every exception a person may see subclasses a built-in, so callers can catch either the project
class or the built-in. Messages are one sentence naming the file, key or field at fault. The
command line prints ``str(exc)`` and exits non-zero; tracebacks only with ``--debug``.
"""

from __future__ import annotations

__all__ = [
    "WingwatchError",
    "ConfigError",
    "FrameRejected",
    "LogFormatError",
    "ModelFileError",
    "IdentificationError",
]


class WingwatchError(Exception):
    """Base of every wingwatch error that is meant for a person to read."""


class ConfigError(WingwatchError, ValueError):
    """A configuration file, scenario or parameter is invalid (names the file and key)."""


class FrameRejected(WingwatchError, ValueError):
    """An inbound message was refused by the codec or the ingest stage.

    Parameters
    ----------
    reason : str
        A short machine-readable reason code from :data:`wingwatch.daemon.codec.REJECT_REASONS`.
    detail : str
        One human sentence saying what was wrong, naming the field.
    """

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


class LogFormatError(WingwatchError, ValueError):
    """A replay log cannot be read at all (bad magic, unsupported version, unreadable header)."""


class ModelFileError(WingwatchError, ValueError):
    """A model file is missing, truncated, of the wrong version or inconsistent."""


class IdentificationError(WingwatchError, ValueError):
    """The data cannot support the requested identification (too little excitation, too short)."""
