"""The ``tba`` command line (`main`); one module per group of commands."""

from tba.cli.commands import main

__all__ = ["main"]
