"""The largest split depth an object of a given volume allows (plain arithmetic, no arrays).

The config loader checks it before anything runs, so it imports nothing heavy.
"""

import math


def split_depth_problem(split_min_depth_nm, max_volume_um3):
    """Why a split depth can never split an object the size range keeps (None if it can).

    A seed rises above its saddle by at most its distance to the background, which is at most
    the radius of the largest ball the object holds, and a ball of volume V has radius
    (3V / 4 pi) ** (1/3).

    Examples
    --------
    >>> split_depth_problem(40, 0.02) is None
    True
    >>> split_depth_problem(200, 0.02)
    'split_min_depth_nm (200 nm) exceeds 168 nm, the radius of a ball of max_volume_um3 (0.02 um^3): no object could be split'
    """
    if max_volume_um3 is None:
        return None
    radius_nm = (3 * max_volume_um3 * 1e9 / (4 * math.pi)) ** (1 / 3)
    if split_min_depth_nm <= radius_nm:
        return None
    return (
        f"split_min_depth_nm ({split_min_depth_nm} nm) exceeds {radius_nm:.0f} nm, the radius of a"
        f" ball of max_volume_um3 ({max_volume_um3} um^3): no object could be split"
    )
