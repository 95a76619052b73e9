"""The one exception type for bad user input.

Anything the user can fix (a scenario key, a file, a command-line value) raises
:class:`InputError` with a one-line message that names the offending key or file and
what is allowed; the command line prints it and exits with status 2.
"""


class InputError(ValueError):
    """Bad user input; the message is one line for the user."""
