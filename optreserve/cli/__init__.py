"""Command line: a thin shell over the Python API. Only here do errors become exit codes."""

from optreserve.cli.app import build_parser, main, run

__all__ = ["build_parser", "main", "run"]
