"""Headlight: inspect attention inside small transformer checkpoints on a CPU, offline."""

__version__ = "0.1.0"
