"""The one error type users see: a clear message naming file, view and field."""

from __future__ import annotations


class InputError(Exception):
    """Bad user input. The CLI prints `str(err)` and exits with status 2, no traceback.

    Build messages with :func:`input_error` so every one names where the problem is.
    """

    exit_code = 2


def input_error(file: str, what: str, *, view: str | None = None, field: str | None = None,
                hint: str | None = None) -> InputError:
    """Make an InputError whose text reads `file [view X] [field Y]: what. hint`."""
    where = str(file)
    if view is not None:
        where += f", view '{view}'"
    if field is not None:
        where += f", field '{field}'"
    msg = f"{where}: {what}"
    if hint:
        msg += f" ({hint})"
    return InputError(msg)
