"""wingwatch daemon: ingest, record, condition, identify, watch and publish.

Everything the daemon decides is driven by sample timestamps, never by the wall clock, so a
replay of a recorded run reproduces the live decisions exactly.
"""

from wingwatch.daemon.version import __version__

__all__ = ["__version__"]
