"""How many test tiles a score's interval needs: the one owner of that rule, read by the
evaluation summary and the methods paragraph."""

#: Fewer test tiles than this and a row's interval is flagged: a bootstrap over a handful of
#: units can only recombine them, so its interval looks narrower than the uncertainty is (one
#: tile gives none). A judgement, not a published rule.
MIN_TEST_TILES = 5


def few_tiles_note(tiles):
    """The ``note`` of a summary row scored on `tiles` test tiles ("" when there are enough).

    Examples
    --------
    >>> few_tiles_note(12)
    ''
    >>> few_tiles_note(1)
    'only 1 test tile: no interval; annotate at least 5 for one'
    >>> few_tiles_note(3)
    'only 3 test tiles: the interval is unreliable; annotate at least 5'
    """
    if tiles >= MIN_TEST_TILES:
        return ""
    if tiles == 1:
        return f"only 1 test tile: no interval; annotate at least {MIN_TEST_TILES} for one"
    return (
        f"only {tiles} test tiles: the interval is unreliable; annotate at least {MIN_TEST_TILES}"
    )
