"""The one error type users see for bad input.

Every message names the file, the row or key, and what was expected, so that a user can fix
the input without reading a traceback.
"""


class TesseraInputError(ValueError):
    """Bad input: a config key, a sheet cell, an image file or a parameter.

    Parameters
    ----------
    message : str
        What is wrong and what was expected.
    source : str, optional
        The file (or file and row/key) the problem is in; prefixed to the message.
    """

    def __init__(self, message, *, source=None):
        self.source = None if source is None else str(source)
        text = message if self.source is None else f"{self.source}: {message}"
        super().__init__(text)


class TesseraResourceError(TesseraInputError):
    """A job needs more memory or disk than it has.

    Raised instead of letting the scheduler kill the job (memory) or leaving a half-written
    output (disk); the message names the file or rule and the setting that gives it more.
    """
