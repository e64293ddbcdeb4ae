"""Section numbers from the file names of a slice folder: order, gaps and duplicates.

Serial-section stacks are saved one file per section with the section number in the name
(``sec_0001.tif``, ``img42.png``). A lost section leaves a hole in that numbering; closing the
hole up would join two sections that were never neighbours and make every z length beyond it
wrong. The number of a file is the last run of digits in its name (without the suffix), so a
date or run number earlier in the name does not count.
"""

import math
import re

from tessera.errors import TesseraInputError

__all__ = ["number_sections"]

_LAST_NUMBER = re.compile(r"(\d+)(?!.*\d)")
#: The largest share of a numbering's sections that may lack a file: lost sections are a few
#: (each becomes a blank placeholder); more points to a stray file or an irregular numbering,
#: which would otherwise turn into a stack of mostly blank sections.
MOST_LOST = 0.25


def number_sections(names, *, source=None):
    """Order section files by their number and find the numbers missing from the sequence.

    The step of the numbering is the greatest common divisor of the differences between
    consecutive numbers (1 for ``0, 1, 2, 4``; 50 for files named by depth ``z0, z50, z150``),
    so a numbering by a constant step other than 1 has no gap.

    Parameters
    ----------
    names : sequence of str
        File names (without folders) of the section images.
    source : str or Path, optional
        The folder, named in error messages.

    Returns
    -------
    dict
        ``names``: the names in section order; ``z``: the section index (from 0) of each name,
        leaving room for the missing ones; ``missing``: the section indices with no file;
        ``numbers``: the section number of every index, present or missing.

    Raises
    ------
    TesseraInputError
        A name without a number, two names with the same number, or more than a quarter of
        the sections without a file (:data:`MOST_LOST`).

    Examples
    --------
    >>> out = number_sections(["s10.tif", "s8.tif", "s11.tif", "s12.tif", "s13.tif"])
    >>> out["names"], out["z"], out["missing"], out["numbers"]
    (['s8.tif', 's10.tif', 's11.tif', 's12.tif', 's13.tif'], [0, 2, 3, 4, 5], [1], [8, 9, 10, 11, 12, 13])
    >>> number_sections(["run2_z000.png", "run2_z050.png", "run2_z100.png"])["missing"]
    []
    """
    numbered = {}
    for name in names:
        stem = name.rsplit(".", 1)[0]
        found = _LAST_NUMBER.search(stem)
        if found is None:
            raise TesseraInputError(
                f"section file {name!r} has no section number in its name; expected every file "
                "numbered (e.g. sec_0001.tif) so that lost sections can be found",
                source=source,
            )
        number = int(found.group(1))
        if number in numbered:
            raise TesseraInputError(
                f"section number {number} appears twice ({numbered[number]!r} and {name!r}); "
                "expected one file per section number",
                source=source,
            )
        numbered[number] = name
    numbers = sorted(numbered)
    step = math.gcd(*(b - a for a, b in zip(numbers, numbers[1:], strict=False))) or 1
    z = [(n - numbers[0]) // step for n in numbers]
    count = z[-1] + 1 if z else 0
    present = set(z)
    lost = count - len(present)
    if lost > count * MOST_LOST:
        raise TesseraInputError(
            f"section numbers {numbers[0]} to {numbers[-1]} in steps of {step} make {count} "
            f"sections, {lost} of them without a file; expected at most a quarter lost (a stray "
            "file, or numbers that are not a regular sequence? rename or remove them)",
            source=source,
        )
    return {
        "names": [numbered[n] for n in numbers],
        "z": z,
        "missing": [i for i in range(count) if i not in present],
        "numbers": [numbers[0] + i * step for i in range(count)],
    }
