"""Surface meshes of labelled objects for viewing, and preview renderings.

Meshes come from marching cubes with the voxel spacing (so they are in physical units, nm or
µm as asked) on each object's bounding box; ``step`` > 1 samples every step-th voxel, which
decimates the mesh for viewing. :mod:`tessera.io.ply` writes them as binary PLY.
"""

import numpy as np
from skimage.measure import marching_cubes

from tessera.errors import TesseraInputError
from tessera.plotting import pyplot
from tessera.spacing import normalize_spacing

UNITS = {"nm": 1.0, "um": 1e-3}


def object_mesh(mask, *, spacing, origin=(0, 0, 0), step=1, unit="nm"):
    """Triangle mesh (vertices z y x, faces) of one binary object.

    Parameters
    ----------
    mask : (P, M, N) bool ndarray
        The object within its bounding box.
    spacing : (float, float, float)
        Voxel size z y x in nm.
    origin : (int, int, int)
        Voxel index of the box's first voxel in the volume (vertices are placed in the volume).
    step : int
        Marching-cubes step size; 2 or more decimates.
    unit : {'nm', 'um'}

    Returns
    -------
    vertices : (V, 3) float32, faces : (F, 3) int32

    Examples
    --------
    >>> v, f = object_mesh(np.ones((3, 3, 3), bool), spacing=(40, 8, 8), unit="um")
    >>> float(v[:, 0].max() - v[:, 0].min()) <= 0.16 and f.shape[1] == 3
    True
    """
    if unit not in UNITS:
        raise TesseraInputError(f"mesh unit must be one of {', '.join(UNITS)}, got {unit!r}")
    spacing = normalize_spacing(spacing, 3)
    mask = np.asarray(mask, bool)
    if not mask.any():
        raise TesseraInputError("cannot make a mesh of an empty object")
    padded = np.pad(mask.astype(np.float32), 1)
    try:
        verts, faces, _, _ = marching_cubes(padded, level=0.5, spacing=spacing, step_size=int(step))
    except RuntimeError:
        # an object thinner than the step has no surface on the coarse grid: keep it whole
        verts, faces, _, _ = marching_cubes(padded, level=0.5, spacing=spacing, step_size=1)
    verts = (verts + (np.asarray(origin) - 1) * np.asarray(spacing)) * UNITS[unit]
    return verts.astype(np.float32), faces.astype(np.int32)


def render_preview(meshes, path, *, title="", unit="nm"):
    """A PNG rendering of meshes (matplotlib, shaded by face orientation).

    Parameters
    ----------
    meshes : list of (vertices, faces, object id)
        As made by :func:`object_mesh` (vertices z y x); each object gets a colour of its own.
    path : path or file-like
        Where the PNG goes.
    title : str
    unit : str
        Unit of the vertices, for the axis labels.

    Examples
    --------
    >>> import io
    >>> png = io.BytesIO()
    >>> render_preview([(*object_mesh(np.ones((2, 2, 2), bool), spacing=(1, 1, 1)), 1)], png)
    >>> png.getvalue()[:4]
    b'\x89PNG'
    """
    plt = pyplot()
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection  # noqa: PLC0415 - after pyplot() chose Agg

    fig = plt.figure(figsize=(5, 5))
    ax = fig.add_subplot(projection="3d")
    lows, highs = [], []
    cmap = plt.get_cmap("tab20")
    for verts, faces, object_id in meshes:
        xyz = verts[:, ::-1]
        triangles = xyz[faces]
        normals = np.cross(triangles[:, 1] - triangles[:, 0], triangles[:, 2] - triangles[:, 0])
        norm = np.linalg.norm(normals, axis=1, keepdims=True)
        light = np.clip((normals / np.where(norm > 0, norm, 1)) @ np.array([0.3, 0.5, 0.8]), 0, 1)
        base = np.array(cmap(int(object_id) % 20)[:3])
        colours = np.clip(base[None] * (0.35 + 0.65 * light[:, None]), 0, 1)
        ax.add_collection3d(Poly3DCollection(triangles, facecolors=colours, linewidths=0))
        lows.append(xyz.min(axis=0))
        highs.append(xyz.max(axis=0))
    if lows:
        low, high = np.min(lows, axis=0), np.max(highs, axis=0)
        centre, half = (low + high) / 2, (high - low).max() / 2 or 1.0
        for setter, c in zip((ax.set_xlim, ax.set_ylim, ax.set_zlim), centre, strict=True):
            setter(c - half, c + half)
    ax.set_xlabel(f"x ({unit})")
    ax.set_ylabel(f"y ({unit})")
    ax.set_zlabel(f"z ({unit})")
    ax.set_title(title, fontsize=8)
    fig.savefig(path, dpi=90, format="png")
    plt.close(fig)


def object_meshes(labels, objects, *, spacing, step=1, unit="nm"):
    """Meshes of every object of an object table, reading each bounding box of `labels`.

    Parameters
    ----------
    labels : (Z, Y, X) array-like
        Label volume (zarr or numpy); only bounding boxes are read, one object at a time.
    objects : pandas.DataFrame
        The object table (``id`` and bounding box ``z0 y0 x0 z1 y1 x1``, ends exclusive).
    spacing : (float, float, float)
        Voxel size z y x in nm.
    step : int
        Marching-cubes step size (see :func:`object_mesh`).
    unit : {'nm', 'um'}

    Returns
    -------
    list of (vertices, faces, object id)
        In the order of the table; vertices are placed in the volume.

    Examples
    --------
    >>> import pandas as pd
    >>> labels = np.zeros((4, 6, 6), np.uint32); labels[1:3, 1:3, 1:3] = 5
    >>> table = pd.DataFrame({"id": [5], "z0": [1], "y0": [1], "x0": [1], "z1": [3], "y1": [3], "x1": [3]})
    >>> [(object_id, float(v[:, 2].min()), float(v[:, 2].max())) for v, f, object_id in
    ...  object_meshes(labels, table, spacing=(1, 1, 1))]
    [(5, 0.5, 2.5)]
    """
    meshes = []
    for row in objects.itertuples(index=False):
        box = np.asarray(labels[row.z0 : row.z1, row.y0 : row.y1, row.x0 : row.x1]) == row.id
        verts, faces = object_mesh(
            box, spacing=spacing, origin=(row.z0, row.y0, row.x0), step=step, unit=unit
        )
        meshes.append((verts, faces, int(row.id)))
    return meshes
