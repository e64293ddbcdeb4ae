"""The values of an annotation tile, the one place they are defined.

0 is background, 1 the target organelle and 255 "ignore": unsure pixels, left out of training
and of every score.
"""

#: Label values of an annotation tile.
BACKGROUND, TARGET, IGNORE = 0, 1, 255
