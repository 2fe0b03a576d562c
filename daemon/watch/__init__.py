"""Watchers: drift detection, stale-model test, sensor health and curvature margin (advisory)."""

__all__: list[str] = []
