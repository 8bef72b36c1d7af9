"""Errors the tool reports to users.

`InputError` is bad input (a file, row, key or option that is wrong): the CLI prints its
message on one line and exits with status 2. Anything else escaping a command is an
internal error (exit 1).
"""


class InputError(ValueError):
    """Bad input. The message names the file, the row or key, and what is wrong."""


class ScenarioError(InputError):
    """A scenario folder breaks the data contract."""
