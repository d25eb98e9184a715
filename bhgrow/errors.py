"""Exceptions that the command line turns into a clear message and exit code 2.

Any error caused by what the user gave us (a tree file, a config, a parameter value) is a
:class:`BhgrowInputError`. Its message names the source (file or component), the rule broken
and the offending rows or keys; the CLI prints it without a traceback and exits with 2.
"""

from __future__ import annotations


class BhgrowInputError(ValueError):
    """Bad user input: a malformed tree file, config key or parameter value.

    Parameters
    ----------
    message : str
        Complete, human-readable message (what, where, which rows).
    source : str, optional
        File name or component name the error refers to.
    rule : str, optional
        Short machine-readable name of the rule that was broken (e.g. ``"duplicate_ids"``).
    rows : sequence, optional
        The first offending ids or row numbers.
    """

    def __init__(self, message: str, *, source: str | None = None, rule: str | None = None,
                 rows=None):
        super().__init__(message)
        self.source = source
        self.rule = rule
        self.rows = list(rows) if rows is not None else []


class ParameterError(BhgrowInputError):
    """A component parameter is out of range or of the wrong kind."""
