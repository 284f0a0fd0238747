"""Exceptions for bad input, and the exit codes the command line maps them to.

Hierarchy::

    TiltauditError                 base; carries ``exit_code``
    ├── InputError                 whole-input problem: nothing is written (exit 2)
    │   ├── ReadError              file missing or unreadable
    │   ├── SchemaError            missing column or a column of the wrong type
    │   ├── SharedTableError       a bad row in a table every portfolio uses
    │   └── OptionError            a bad option value
    └── OutputLockedError          another run holds the output folder (exit 4)

Problems confined to one portfolio are not exceptions: they become ``data_issues`` rows
(see :mod:`attribution.validate`), and the rest of the roster still runs.
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_INPUT = 2
EXIT_SKIPPED = 3
EXIT_LOCKED = 4


class TiltauditError(Exception):
    """Base class; ``exit_code`` is what the command line returns."""

    exit_code = EXIT_INPUT


class InputError(TiltauditError):
    """A whole-input problem: the run stops before anything is written."""

    exit_code = EXIT_INPUT


class ReadError(InputError):
    """An input file is missing or cannot be read."""


class SchemaError(InputError):
    """A required column is missing or has the wrong type."""


class SharedTableError(InputError):
    """A bad row in a table shared by all portfolios (index_returns, riskfree)."""


class OptionError(InputError):
    """An option has a value outside its allowed set or range."""


class OutputLockedError(TiltauditError):
    """Another run holds the output folder."""

    exit_code = EXIT_LOCKED


def examples(keys: list[object], limit: int = 3) -> str:
    """Format up to ``limit`` offending keys for an error message, with a count of the rest."""
    shown = ", ".join(repr(k) for k in keys[:limit])
    more = len(keys) - limit
    return shown + (f" (and {more} more)" if more > 0 else "")
