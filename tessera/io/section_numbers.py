"""Section numbers from the file names of a slice folder: order, gaps and duplicates.

Serial-section stacks are saved one file per section with the section number in the name
(``sec_0001.tif``, ``img42.png``). A lost section leaves a hole in that numbering; closing the
hole up would join two sections that were never neighbours and make every z length beyond it
wrong. The number of a file is the run of digits (a digit group) whose value changes from file to
file: names are compared group by group, left to right, so a run number, date or pixel size
elsewhere in the name (``run2_sec010.tif``, ``s_0003_5nm.tif``) does not count. Where no single
group changes (several do, or the names hold different counts of groups), the last group is
the number.
"""

import math
import re

from tessera.errors import TesseraInputError

__all__ = ["number_sections", "varying_groups"]

_DIGITS = re.compile(r"\d+")
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
        A name without a number, two names with the same number (naming the digit groups that
        vary where more than one does), or more than a quarter of the sections without a file
        (:data:`MOST_LOST`).

    Examples
    --------
    >>> out = number_sections(["s10.tif", "s8.tif", "s11.tif", "s12.tif", "s13.tif"])
    >>> out["names"], out["z"], out["missing"], out["numbers"]
    (['s8.tif', 's10.tif', 's11.tif', 's12.tif', 's13.tif'], [0, 2, 3, 4, 5], [1], [8, 9, 10, 11, 12, 13])
    >>> number_sections(["run2_z000.png", "run2_z050.png", "run2_z100.png"])["missing"]
    []
    >>> number_sections(["s_0001_5nm.tif", "s_0000_5nm.tif"])["names"]
    ['s_0000_5nm.tif', 's_0001_5nm.tif']
    """
    numbered = _numbered(names, source=source)
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


def _digit_groups(name, *, source):
    """The values of the runs of digits in a file name (without its suffix), left to right."""
    groups = [int(g) for g in _DIGITS.findall(name.rsplit(".", 1)[0])]
    if not groups:
        raise TesseraInputError(
            f"section file {name!r} has no section number in its name; expected every file "
            "numbered (e.g. sec_0001.tif) so that lost sections can be found",
            source=source,
        )
    return groups


def varying_groups(groups):
    """The positions of the digit groups whose value differs between names.

    Parameters
    ----------
    groups : sequence of sequence of int
        Per name, the values of its digit groups, left to right.

    Returns
    -------
    list of int
        Positions from 0; empty when the names hold different counts of groups (positions do
        not line up) or when no group changes.

    Examples
    --------
    >>> varying_groups([[2, 10, 1], [2, 11, 1], [2, 12, 1]])
    [1]
    >>> varying_groups([[2, 10, 1], [2, 10, 2], [2, 11, 1]])
    [1, 2]
    >>> varying_groups([[1], [1, 2]])
    []
    """
    counts = {len(g) for g in groups}
    if len(counts) != 1:
        return []
    return [i for i in range(counts.pop()) if len({g[i] for g in groups}) > 1]


def _numbered(names, *, source):
    """Section number → file name: the one digit group that varies, else the last group."""
    groups = [_digit_groups(name, source=source) for name in names]
    varying = varying_groups(groups)
    position = varying[0] if len(varying) == 1 else -1
    numbered = {}
    for name, values in zip(names, groups, strict=True):
        number = values[position]
        if number in numbered:
            raise TesseraInputError(_clash(number, numbered[number], name, varying), source=source)
        numbered[number] = name
    return numbered


def _clash(number, first, second, varying):
    """The message for two files given one section number."""
    if len(varying) < 2:
        return (
            f"section number {number} appears twice ({first!r} and {second!r}); "
            "expected one file per section number"
        )
    places = [str(i + 1) for i in varying]
    return (
        f"section number {number} appears twice ({first!r} and {second!r}): digit groups "
        f"{', '.join(places[:-1])} and {places[-1]} of the names (counted from the left) vary "
        "from file to file, so which one numbers the sections is ambiguous, and the last one "
        "gives both files this number; expected one group of digits that changes from section "
        "to section (rename the files)"
    )
