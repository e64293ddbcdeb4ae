"""The catalogue of bad input in DEVELOPERS.md stays in step with the tests that check it.

Each row of the table "Bad input the project recognises" names the test that proves the check
(``tests/<file>.py::<test function>``) and quotes the message. The named test function is parsed
with ``ast``, and every telling fragment of the quoted message (the text between placeholders)
must appear in what that function itself checks: the ``match=`` patterns of its
``pytest.raises``/``pytest.warns`` and the strings of its ``assert ... in ...`` and
``assert ... == ...``, together with the parameters of its ``@pytest.mark.parametrize``. Comments,
docstrings and other functions of the file do not count, so a message reworded in the code and its
test, but not in the catalogue, fails here, and so does a row pointing at a test that checks
something else.

Rows that describe behaviour which is not an error (the message column starts with "not an
error:") have no message to find; their rule is `check_not_an_error_row`.
"""

import ast
import re
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]

HEADING = "## Bad input the project recognises"
# placeholders of the abridged messages: <file>, …, ..., and the standalone letter N; numbers
# and quoted values vary by case, so they split a message too; tests often match a message in
# parts (one pattern for the file and row, another for the reason), so "; ", ": " and ", " end
# a fragment as well
PLACEHOLDER = re.compile(r"<[^>]*>|…|\.\.\.|\bN\b|\d+(?:\.\d+)?|'[^']*'|; |: |, ")
# a fragment shorter than this (e.g. "got", "row", "(") tells nothing about the message
MIN_FRAGMENT = 6
TEST_REFERENCE = re.compile(r"`(tests/test_\w+\.py)::(test_\w+)`")
# the first backtick quote of the message column, and further ones joined to it by " / "
QUOTES = re.compile(r"`([^`]+)`((?: / `[^`]+`)*)")
NOT_AN_ERROR = "not an error:"


def catalogue_rows():
    text = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = text.split(HEADING, 1)[1].split("\n## ", 1)[0]
    lines = [line for line in section.splitlines() if line.startswith("|")]
    assert lines[0].startswith("| input | message") and set(lines[1]) <= {"|", "-"}
    return [[cell.strip() for cell in line.strip("|").split(" | ")] for line in lines[2:]]


def quoted_messages(message):
    """The messages a row quotes: its first backtick quote and those joined to it by `` / ``.

    Examples
    --------
    >>> quoted_messages("`<mask>: no target …` / `no background` unless `x` is set")
    ['<mask>: no target …', 'no background']
    """
    found = QUOTES.search(message)
    assert found, f"no quoted message in {message!r}"
    return [found.group(1), *re.findall(r"`([^`]+)`", found.group(2))]


def fragments(message):
    """The fragments of a row's quoted messages between placeholders, long enough to be telling.

    Examples
    --------
    >>> fragments("`<mask>: the mask has no target pixels …` / `unexpected values [7]`")
    ['the mask has no target pixels', 'unexpected values']
    >>> fragments("`row N (tile …): the 16 x 16 tile around … outside the image`")
    ['tile around', 'outside the image']
    """
    pieces = (
        p.strip(" :;,.()[]/-") for q in quoted_messages(message) for p in PLACEHOLDER.split(q)
    )
    return [p for p in pieces if len(p) >= MIN_FRAGMENT]


def named_function(file, name):
    """The parsed module ``tests/<file>.py`` and its module-level ``def name`` (or None)."""
    tree = ast.parse((REPO / file).read_text(encoding="utf-8"))
    for node in tree.body:
        if isinstance(node, ast.FunctionDef) and node.name == name:
            return tree, node
    return tree, None


def strings(node):
    """Every string constant under an expression, the literal parts of f-strings included."""
    return [
        n.value for n in ast.walk(node) if isinstance(n, ast.Constant) and isinstance(n.value, str)
    ]


def _is_parametrize(decorator):
    target = decorator.func if isinstance(decorator, ast.Call) else decorator
    return isinstance(target, ast.Attribute) and target.attr == "parametrize"


def _names_bound_to(function, name):
    """The values a local name is given in the function: assignments and ``for`` loops."""
    values = []
    for node in ast.walk(function):
        if isinstance(node, ast.Assign):
            if any(
                name in {n.id for n in ast.walk(t) if isinstance(n, ast.Name)} for t in node.targets
            ):
                values.append(node.value)
        elif isinstance(node, (ast.For, ast.comprehension)):
            if name in {n.id for n in ast.walk(node.target) if isinstance(n, ast.Name)}:
                values.append(node.iter)
    return values


def checked_strings(function, module):
    r"""The strings a test function checks messages against.

    These are the ``match=`` arguments of its ``pytest.raises``/``pytest.warns``, both sides of
    every ``in`` and ``==`` comparison inside an ``assert``, the arguments of
    ``startswith``/``endswith`` inside an ``assert``, the values of local names used there (a
    loop over cases, a message built beforehand), and the parameters of the function's
    ``@pytest.mark.parametrize``. A ``match=`` pattern built by a helper function of the same
    file counts with what that helper returns. Regular-expression escapes are dropped, so
    ``match=r"shape \(8, 9\)"`` reads as ``shape (8, 9)``.

    Examples
    --------
    >>> module = ast.parse(r'''
    ... def test_x(path):
    ...     "docstring: not checked"
    ...     # a comment is not checked either
    ...     with pytest.raises(Error, match=r"bad \(value\)") as error:
    ...         f(path)
    ...     assert "told" in str(error.value) and str(error.value).startswith(f"{path}: ")
    ...     assert "ignored" not in str(error.value)
    ... ''')
    >>> checked_strings(module.body[0], module)
    ['bad (value)', 'told', ': ']
    """
    patterns, asserted = [], []
    for decorator in function.decorator_list:
        if _is_parametrize(decorator):
            asserted.append(decorator)
    for node in ast.walk(function):
        if isinstance(node, ast.Call):
            callee = node.func
            if isinstance(callee, ast.Attribute) and callee.attr in {"raises", "warns"}:
                patterns += [k.value for k in node.keywords if k.arg == "match"]
        elif isinstance(node, ast.Assert):
            for part in ast.walk(node.test):
                if isinstance(part, ast.Compare) and all(
                    isinstance(op, (ast.In, ast.Eq)) for op in part.ops
                ):
                    asserted += [part.left, *part.comparators]
                elif (
                    isinstance(part, ast.Call)
                    and isinstance(part.func, ast.Attribute)
                    and part.func.attr in {"startswith", "endswith"}
                ):
                    asserted += part.args
    helpers = {n.name: n for n in module.body if isinstance(n, ast.FunctionDef)}
    checked = [(expression, True) for expression in patterns]
    checked += [(expression, False) for expression in asserted]
    seen = set()
    for expression, is_pattern in checked:  # grows while it is read: names lead to values
        for name in (n.id for n in ast.walk(expression) if isinstance(n, ast.Name)):
            if (name, is_pattern) in seen:
                continue
            seen.add((name, is_pattern))
            checked += [(value, is_pattern) for value in _names_bound_to(function, name)]
            if is_pattern and name in helpers:
                returns = [n.value for n in ast.walk(helpers[name]) if isinstance(n, ast.Return)]
                checked += [(value, True) for value in returns if value is not None]
    return [s.replace("\\", "") for expression, _ in checked for s in strings(expression)]


# calls that read or hash a file's bytes: a comparison built on them is byte for byte
BYTE_READERS = re.compile(r"read_bytes|tobytes|digest|sha256")


def check_not_an_error_row(what, message, file, name):
    """A row that is not an error says its results are byte-identical and names a test proving it.

    Such a row quotes no message. What ties it to its test: the function exists, and one of its
    asserts rests on values computed from file bytes (a call whose name says it reads or hashes
    bytes: ``read_bytes``, ``tobytes``, ``*digest*``, ``*sha256*``), directly or through names
    derived from them, such as the list of result files whose digests differ.
    """
    assert "byte-identical" in message, f"{what!r}: say which results stay byte-identical"
    _, function = named_function(file, name)
    assert function is not None, f"{what!r}: {file} defines no {name}"

    def called(node):
        return {
            c.func.id if isinstance(c.func, ast.Name) else c.func.attr
            for c in ast.walk(node)
            if isinstance(c, ast.Call) and isinstance(c.func, (ast.Name, ast.Attribute))
        }

    def names(node):
        return {n.id for n in ast.walk(node) if isinstance(n, ast.Name)}

    assignments = [n for n in ast.walk(function) if isinstance(n, ast.Assign)]
    from_bytes = set()
    while True:  # names holding bytes or digests, and names computed from those
        grown = from_bytes | {
            target
            for a in assignments
            if any(BYTE_READERS.search(c) for c in called(a.value)) or names(a.value) & from_bytes
            for t in a.targets
            for target in names(t)
        }
        if grown == from_bytes:
            break
        from_bytes = grown
    asserts = [n.test for n in ast.walk(function) if isinstance(n, ast.Assert)]
    assert any(names(test) & from_bytes for test in asserts), (
        f"{what!r}: {name} asserts nothing computed from the files' bytes"
    )


def test_the_catalogue_is_large_enough_to_mean_something():
    rows = catalogue_rows()
    assert len(rows) >= 25
    assert all(len(row) == 3 for row in rows), [row[0] for row in rows if len(row) != 3]
    inputs = [row[0] for row in rows]
    assert len(set(inputs)) == len(inputs), "each kind of bad input appears once"


@pytest.mark.parametrize("row", catalogue_rows(), ids=lambda row: row[0][:40])
def test_each_row_names_a_test_that_checks_its_message(row):
    what, message, tests = row
    references = TEST_REFERENCE.findall(tests)
    assert len(references) == 1, f"{what!r}: the test column names one tests/<file>.py::<test>"
    ((file, name),) = references
    assert (REPO / file).is_file(), f"{what!r}: {file} does not exist"
    if message.startswith(NOT_AN_ERROR):
        check_not_an_error_row(what, message, file, name)
        return
    module, function = named_function(file, name)
    assert function is not None, f"{what!r}: {file} defines no {name}"
    pieces = fragments(message)
    assert pieces, f"{what!r}: the quoted message is all placeholders"
    checked = checked_strings(function, module)
    missing = [p for p in pieces if not any(p in s for s in checked)]
    assert not missing, f"{what!r}: {file}::{name} does not check {missing}"
