"""Checks that keep a damaged image file from becoming a shorter or altered volume.

Image readers are forgiving: tifffile logs "invalid page offset" and returns the pages it could
reach, Pillow and mrcfile warn about surplus bytes. A forgiving reader turns a file cut short in
copying into a plausible but shorter stack. Every stack reader in :mod:`tessera.io` therefore
reads through these checks, which turn each complaint into one
:class:`~tessera.errors.TesseraInputError` naming the file.
"""

import contextlib
import logging
import re
import warnings

import numpy as np

from tessera.errors import TesseraInputError

__all__ = ["check_file_size", "check_section", "complaints_as_errors", "reader_complaints"]

_TAG = re.compile(r"^<[^>]*>\s*")


class _Collect(logging.Handler):
    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.messages = []

    def emit(self, record):
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def reader_complaints(loggers=("tifffile",)):
    """Collect a reader's complaints: yields a list that receives them when the block ends.

    Log records of level WARNING or higher from the named loggers, and Python warnings, raised
    inside the block are appended as one-line texts (a leading ``<object ...>`` tag, as tifffile
    writes, is dropped). Inside the block those loggers do not pass their records on to the
    handlers above them, so a complaint is not printed besides.

    Examples
    --------
    >>> with reader_complaints(("demo",)) as complaints:
    ...     logging.getLogger("demo").warning("<TiffPages @8> invalid page offset 1234")
    >>> complaints
    ['invalid page offset 1234']
    """
    handler = _Collect()
    saved = []
    for name in loggers:
        log = logging.getLogger(name)
        saved.append((log, log.level, log.propagate))
        if not log.isEnabledFor(logging.WARNING):
            log.setLevel(logging.WARNING)  # a quieter root logger must not hide the complaint
        # collected, not printed too: the complaint reaches the user as part of one error line
        log.propagate = False
        log.addHandler(handler)
    complaints = []
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            yield complaints
    finally:
        for log, level, propagate in saved:
            log.removeHandler(handler)
            log.setLevel(level)
            log.propagate = propagate
        for text in handler.messages + [str(w.message) for w in caught]:
            complaints.append(_TAG.sub("", " ".join(text.split())))


@contextlib.contextmanager
def complaints_as_errors(source, *, what, loggers=("tifffile",)):
    """Raise one error for the first warning or log complaint of a reader inside the block.

    Complaints are collected as by :func:`reader_complaints`; if there were any, the block's
    end raises ``TesseraInputError("<source>: <what>: <first complaint>")``. Exceptions raised
    inside the block pass through unchanged.

    Parameters
    ----------
    source : str or Path
        The file being read, named in the message.
    what : str
        What was being done, e.g. ``"reading page 3"``.
    loggers : sequence of str, optional
        Names of the loggers the reader complains through.

    Examples
    --------
    >>> with complaints_as_errors("s.tif", what="reading", loggers=("demo",)):
    ...     logging.getLogger("demo").warning("invalid page offset 1234")
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: s.tif: reading: invalid page offset 1234
    """
    with reader_complaints(loggers) as complaints:
        yield
    if complaints:
        raise TesseraInputError(f"{what}: {complaints[0]}", source=source)


def check_section(plane, *, z, shape, dtype, source):
    """Refuse a section of another shape or dtype than the stack's, or with NaN or infinity.

    Parameters
    ----------
    plane : ndarray
        One section as read.
    z : int
        Its index, named in the message.
    shape : tuple of int
        The (y, x) shape every section must have.
    dtype : numpy dtype
        The dtype every section must have.
    source : str or Path
        The file, named in the message.

    Returns
    -------
    ndarray
        `plane`, unchanged.

    Examples
    --------
    >>> check_section(np.zeros((2, 2)), z=0, shape=(2, 2), dtype=np.float64, source="a.mrc").shape
    (2, 2)
    >>> check_section(np.array([[0.0, np.nan]]), z=3, shape=(1, 2), dtype=np.float64,
    ...               source="a.mrc")
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: a.mrc: section 3 holds 1 NaN or infinite value(s); expected finite numbers (mask them in the source, or fill them)
    """
    plane = np.asarray(plane)
    if plane.shape != tuple(shape):
        raise TesseraInputError(
            f"section {z} has shape {plane.shape}, expected {tuple(shape)} like section 0",
            source=source,
        )
    if plane.dtype != np.dtype(dtype):
        raise TesseraInputError(
            f"section {z} has pixels of type {plane.dtype}, expected {np.dtype(dtype)} "
            "like section 0",
            source=source,
        )
    if np.issubdtype(plane.dtype, np.floating):
        bad = int(np.count_nonzero(~np.isfinite(plane)))
        if bad:
            raise TesseraInputError(
                f"section {z} holds {bad} NaN or infinite value(s); expected finite numbers "
                "(mask them in the source, or fill them)",
                source=source,
            )
    return plane


def check_file_size(path, expected, *, layout):
    """Refuse a file whose size is not what its own header says it must be.

    Parameters
    ----------
    path : Path
        The file.
    expected : int
        Its size in bytes according to its header.
    layout : str
        How `expected` follows from the header, named in the message.

    Examples
    --------
    >>> import tempfile
    >>> from pathlib import Path
    >>> f = Path(tempfile.mkdtemp()) / "a.mrc"
    >>> _ = f.write_bytes(bytes(10))
    >>> check_file_size(f, 12, layout="nx=2, ny=3, nz=1, mode 1 (int16)")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    tessera.errors.TesseraInputError: ...a.mrc: header says nx=2, ny=3, nz=1, mode 1 (int16): expected 12 bytes, the file has 10 (truncated or damaged?)
    """
    size = path.stat().st_size
    if size != expected:
        raise TesseraInputError(
            f"header says {layout}: expected {expected} bytes, the file has {size} "
            f"({'truncated or damaged' if size < expected else 'extra bytes: damaged'}?)",
            source=path,
        )
