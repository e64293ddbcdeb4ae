"""The check_distinct_stacks rule: no two datasets of the sheet may hold one stack.

The sheet's loader refuses two rows naming the same path; a byte-identical copy of a stack
under another name, listed as another dataset (and animal), is only seen by its SHA-256, which
rule checksum_inputs records per dataset. A job of its own before statistics, so that such a
sheet never costs the statistics of the run before.
"""

from tessera.errors import TesseraInputError
from tessera.workflow.files.distinct_stacks import write_distinct_stacks
from tessera.workflow.files.input_checksums import read_input_checksums


def _stack_digest(checksums_path, stack_path):
    """The SHA-256 the record at `checksums_path` lists for `stack_path`."""
    for digest, name in read_input_checksums(checksums_path):
        if name == stack_path:
            return digest
    raise TesseraInputError(
        f"lists no SHA-256 for the stack {stack_path!r}; expected a line for it (rerun rule "
        "checksum_inputs)",
        source=checksums_path,
    )


def check_distinct_stacks_job(checksums, stacks, out_path, *, sheet):
    """Refuse two datasets whose stacks are the same bytes (and array inside them); write the check.

    Parameters
    ----------
    checksums : dict
        Dataset id → its ``inputs.sha256`` (rule checksum_inputs), in sheet order.
    stacks : dict
        Dataset id → ``{"path": ..., "internal_path": ... or None, "subject": ...}`` (the sheet's).
    out_path : str or Path
        The check to write (:mod:`tessera.workflow.files.distinct_stacks`).
    sheet : str
        The datasets sheet, named in the message.

    Returns
    -------
    dict
        ``datasets``: how many were compared.
    """
    digests, seen = {}, {}
    for dataset, checksums_path in checksums.items():
        stack = stacks[dataset]
        digest = _stack_digest(checksums_path, stack["path"])
        key = (digest, stack.get("internal_path") or "")
        if key in seen:
            first = seen[key]
            subjects = (stacks[first]["subject"], stack["subject"])
            if subjects[0] == subjects[1]:
                harm = f"animal {subjects[0]!r} would be measured twice"
            else:
                harm = f"one animal would count twice (as {subjects[0]!r} and {subjects[1]!r})"
            inside = f", internal_path {key[1]!r}" if key[1] else ""
            raise TesseraInputError(
                f"column path: datasets {first} ({stacks[first]['path']!r}) and {dataset} "
                f"({stack['path']!r}{inside}) hold the same stack (SHA-256 {digest[:12]}…): "
                f"{harm}; expected one stack per dataset: remove one row, or point it to its "
                "own animal's stack",
                source=sheet,
            )
        seen[key] = dataset
        digests[dataset] = digest
    write_distinct_stacks(out_path, digests)
    return {"datasets": len(digests)}
