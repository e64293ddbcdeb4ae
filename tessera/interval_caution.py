"""How many test tiles a score's interval needs: the one owner of that rule, read by the
evaluation summary and the methods paragraph. Which tiles count is
:func:`tessera.threshold.informative` (a tile whose pixel scores are defined)."""

#: Fewer informative test tiles than this and a row's interval is flagged: a bootstrap over a
#: handful of units can only recombine them, so its interval looks narrower than the
#: uncertainty is (one tile gives none). A judgement, not a published rule.
MIN_TEST_TILES = 5


def few_tiles_note(tiles, informative_tiles):
    """The ``note`` of a summary row scored on `tiles` test tiles, of which `informative_tiles`
    hold a true or predicted target pixel; "" when enough do.

    Examples
    --------
    >>> few_tiles_note(12, 12)
    ''
    >>> few_tiles_note(1, 1)
    'only 1 test tile: no interval; annotate at least 5 for one'
    >>> few_tiles_note(3, 3)
    'only 3 test tiles: the interval is unreliable; annotate at least 5'
    >>> few_tiles_note(5, 1)[:71]
    'only 1 of 5 test tiles holds the target or a prediction: no interval; a'
    """
    k = int(informative_tiles)
    if k >= MIN_TEST_TILES:
        return ""
    if k == tiles:
        if tiles == 1:
            return f"only 1 test tile: no interval; annotate at least {MIN_TEST_TILES} for one"
        return (
            f"only {tiles} test tiles: the interval is unreliable; annotate at least "
            f"{MIN_TEST_TILES}"
        )
    if k == 0:
        return f"none of the {tiles} test tiles holds the target or a prediction: no score"
    holds = "holds" if k == 1 else "hold"
    verdict = "no interval" if k == 1 else "the interval is unreliable"
    return (
        f"only {k} of {tiles} test tiles {holds} the target or a prediction: {verdict}; "
        f"at least {MIN_TEST_TILES} need to (raise tiles.per_dataset)"
    )
