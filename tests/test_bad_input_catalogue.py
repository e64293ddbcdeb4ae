"""The catalogue of bad input in DEVELOPERS.md stays in step with the tests that check it.

Each row of the table "Bad input the project recognises" names the test that proves the check
(``tests/<file>.py::<test function>``), and a stretch of at least 12 characters of the message the
row quotes (between placeholders) must appear in that test's file: a message reworded in the
code and its test, but not in the catalogue, fails here.
"""

import re
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

HEADING = "## Bad input the project recognises"
# placeholders of the abridged messages: <file>, …, ..., numbers and quoted values vary by case;
# tests often match a message in parts, so the stretches also end at "; ", ": " and ", "
PLACEHOLDER = re.compile(r"<[^>]*>|…|\.\.\.|\d+|'[^']*'|; |: |, ")
MIN_STRETCH = 12
TEST_REFERENCE = re.compile(r"`(tests/test_\w+\.py)::(test_\w+)`")


def catalogue_rows():
    text = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = text.split(HEADING, 1)[1].split("\n## ", 1)[0]
    lines = [line for line in section.splitlines() if line.startswith("|")]
    assert lines[0].startswith("| input | message") and set(lines[1]) <= {"|", "-"}
    return [[cell.strip() for cell in line.strip("|").split(" | ")] for line in lines[2:]]


def stretches(message):
    """The stretches of the first quoted message that hold no placeholder, long enough to be telling.

    Examples
    --------
    >>> stretches("`<mask>: the mask has no target pixels …` / `other`")
    ['the mask has no target pixels']
    """
    quote = re.search(r"`([^`]+)`", message)
    assert quote, f"no quoted message in {message!r}"
    pieces = (p.strip(" :;,.()[]") for p in PLACEHOLDER.split(quote.group(1)))
    return [p for p in pieces if len(p) >= MIN_STRETCH]


def test_the_catalogue_is_large_enough_to_mean_something():
    rows = catalogue_rows()
    assert len(rows) >= 25
    assert all(len(row) == 3 for row in rows), [row[0] for row in rows if len(row) != 3]
    inputs = [row[0] for row in rows]
    assert len(set(inputs)) == len(inputs), "each kind of bad input appears once"


@pytest.mark.parametrize("row", catalogue_rows(), ids=lambda row: row[0][:40])
def test_each_row_names_a_test_that_exists_and_quotes_its_message(row):
    what, message, tests = row
    references = TEST_REFERENCE.findall(tests)
    assert references, f"{what!r}: the test column names no tests/<file>.py::<test>"
    sources = []
    for file, function in references:
        path = REPO / file
        assert path.is_file(), f"{what!r}: {file} does not exist"
        source = path.read_text(encoding="utf-8")
        assert re.search(rf"^def {function}\(", source, flags=re.M), (
            f"{what!r}: {file} defines no {function}"
        )
        sources.append(source.replace("\\", ""))  # regular-expression escapes aside
    pieces = stretches(message)
    assert pieces, f"{what!r}: the quoted message is all placeholders"
    assert any(p in source for p in pieces for source in sources), (
        f"{what!r}: none of {pieces} appears in {references}"
    )
