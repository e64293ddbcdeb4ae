"""pyplot on the Agg canvas: jobs draw PNG files, never to a screen."""


def pyplot():
    """matplotlib.pyplot with the non-interactive Agg backend selected.

    The imports stay inside: the backend must be chosen before pyplot is first imported, and
    modules that only might plot should not pay for matplotlib at import time.

    Examples
    --------
    >>> pyplot().get_backend().lower()
    'agg'
    """
    import matplotlib  # noqa: PLC0415 - the backend is chosen before pyplot loads

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt  # noqa: PLC0415 - after the backend is chosen

    return plt
