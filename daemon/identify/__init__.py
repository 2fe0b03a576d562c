"""Identification maths: ERA, OKID, recursive least squares, modes (pure functions and small estimators)."""

__all__: list[str] = []
