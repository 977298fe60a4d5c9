"""Exceptions raised by sitecheck."""


class InputError(ValueError):
    """A problem with the user's data or options that the user can fix.

    The message is one line and names the offending file, column or option.
    The command-line interface turns it into exit code 2.
    """


class ParameterError(ValueError):
    """An invalid parameter passed to a library function: a programming error.

    Not an :class:`InputError` (the user cannot fix it by changing the data or the
    options); the command-line interface reports it as an internal error, exit code 3.
    """
