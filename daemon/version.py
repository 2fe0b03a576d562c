"""The software version, recorded in every replay log header and published model."""

__all__ = ["__version__"]

__version__ = "0.1.0"
