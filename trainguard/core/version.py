"""The trainguard version, recorded in every golden it writes (`trainguard.writer`)."""

__version__ = "0.1.0"
