"""ivdossier: a local-first registry of candidate instruments, their validity arguments and diagnostics."""

__version__ = "0.1.0"
