"""Exceptions raised by sitecheck."""


class InputError(ValueError):
    """A problem with the user's data or options that the user can fix.

    The message is one line and names the offending file, column or value.
    The command-line interface turns it into exit code 2.

    Parameters
    ----------
    message : str
    option : str, optional
        The setting the user can change to fix it (a :class:`~sitecheck.scan.ScanOptions`
        field or reading option such as ``"encoding"``, ``"sep"``, ``"min_site_rows"``);
        the command line names the matching flag.

    Examples
    --------
    >>> from sitecheck import InputError
    >>> try:
    ...     raise InputError("column 'crp' not found in the table", option="site")
    ... except InputError as exc:
    ...     print(exc, "|", exc.option)
    column 'crp' not found in the table | site
    """

    def __init__(self, message: str, *, option: "str | None" = None):
        super().__init__(message)
        self.option = option


class ParameterError(ValueError):
    """An invalid parameter passed to a library function: a programming error.

    Not an :class:`InputError` (the user cannot fix it by changing the data or the
    options); the command-line interface reports it as an internal error, exit code 3.
    """
