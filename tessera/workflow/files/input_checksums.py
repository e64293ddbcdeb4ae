"""The checksum_inputs rule's record, ``results/<dataset>/audit/inputs.sha256``, read by the
methods text: its one writer and reader.

One ``<sha256>  <path>`` line per input file, the layout ``sha256sum --check`` reads.
"""

from pathlib import Path

from tessera.io.atomic import write_text


def write_input_checksums(path, digests):
    """Write ``(sha256, file)`` pairs, one line each.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "inputs.sha256"
    >>> write_input_checksums(path, [("ab12", "data/a.tif"), ("cd34", "data/a roi.tif")])
    >>> path.read_text()
    'ab12  data/a.tif\\ncd34  data/a roi.tif\\n'
    >>> read_input_checksums(path)
    [('ab12', 'data/a.tif'), ('cd34', 'data/a roi.tif')]
    """
    lines = [f"{digest}  {file}" for digest, file in digests]
    write_text(path, "\n".join(lines) + "\n")


def read_input_checksums(path):
    """The ``(sha256, file)`` pairs written by :func:`write_input_checksums`, in file order."""
    pairs = []
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        digest, _, name = line.partition("  ")
        pairs.append((digest, name))
    return pairs
