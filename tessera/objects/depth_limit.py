"""The split depth of a setting and a voxel size, and the largest depth an object of a given
volume allows (plain arithmetic, no arrays).

The config loader checks the latter before anything runs, so this module imports nothing heavy.
"""

import math

#: The depth ``auto`` gives where every voxel side is finer: chosen on isotropic validation
#: volumes (16 nm voxels: object F1 0.995 at 30 nm, 1.000 at 20 nm, 0.967 at 40 nm), as the
#: deepest setting within 0.02 of the best.
AUTO_DEPTH_FLOOR_NM = 30.0
#: What ``auto`` means, in words (the methods paragraph quotes it).
AUTO_DEPTH_RULE = f"the larger of {AUTO_DEPTH_FLOOR_NM:g} nm and the coarsest voxel side"


def split_depth_nm(setting, spacing):
    """The split depth in nm that `setting` means for voxels of `spacing` (z, y, x, nm).

    A number is the depth itself. ``"auto"`` is the larger of :data:`AUTO_DEPTH_FLOOR_NM` and
    the coarsest voxel side: a distance to the background measured on a voxel grid steps by up to
    one voxel side where an outline crosses the grid obliquely, so maxima shallower than that
    are as often the grid's as an organelle's. On the demo's validation volumes (40 nm sections,
    16 nm pixels) the chosen depth was 40 nm; on the open serial-section stack (50 nm sections)
    30 nm cut single organelles at narrow places and 50 nm cut none.

    Examples
    --------
    >>> split_depth_nm("auto", (40.0, 16.0, 16.0)), split_depth_nm("auto", (10.0, 10.0, 10.0))
    (40.0, 30.0)
    >>> split_depth_nm(25, (40.0, 16.0, 16.0))
    25
    """
    if isinstance(setting, str) and setting == "auto":
        return max(AUTO_DEPTH_FLOOR_NM, *(float(side) for side in spacing))
    return setting  # a number, checked where it is used (check_split_depth)


def split_depth_problem(split_min_depth_nm, max_volume_um3, *, shown=None):
    """Why a split depth can never split an object the size range keeps (None if it can).

    A seed rises above its saddle by at most its distance to the background, which is at most
    the radius of the largest ball the object holds, and a ball of volume V has radius
    (3V / 4 pi) ** (1/3). `shown` names the depth in the message instead of its value (``auto``
    and its floor, say).

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
        f"split_min_depth_nm ({shown or f'{split_min_depth_nm} nm'}) exceeds {radius_nm:.0f} nm, "
        "the radius of a"
        f" ball of max_volume_um3 ({max_volume_um3} um^3): no object could be split"
    )
