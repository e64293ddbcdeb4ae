"""Surface meshes of labelled objects for viewing, and preview renderings.

Meshes come from marching cubes with the voxel spacing (so they are in physical units, nm or
µm as asked) on each object's bounding box; ``step`` > 1 samples every step-th voxel, which
decimates the mesh for viewing. Written as binary little-endian PLY, a plain format every mesh
viewer reads, with the unit in a comment line.
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


def write_ply(path, meshes, *, unit="nm", comment=""):
    """Write meshes [(vertices, faces, object id), ...] to one binary PLY, x y z order.

    Each vertex carries its object id, so a viewer can colour objects apart.
    """
    vertices = [m[0] for m in meshes]
    n_vertices = sum(len(v) for v in vertices)
    n_faces = sum(len(m[1]) for m in meshes)
    header = [
        "ply",
        "format binary_little_endian 1.0",
        f"comment unit {unit}",
        *([f"comment {comment}"] if comment else []),
        f"element vertex {n_vertices}",
        "property float x",
        "property float y",
        "property float z",
        "property int object",
        f"element face {n_faces}",
        "property list uchar int vertex_indices",
        "end_header",
    ]
    vertex_type = np.dtype([("x", "<f4"), ("y", "<f4"), ("z", "<f4"), ("object", "<i4")])
    face_type = np.dtype([("n", "u1"), ("a", "<i4"), ("b", "<i4"), ("c", "<i4")])
    with open(path, "wb") as fh:
        fh.write(("\n".join(header) + "\n").encode("ascii"))
        offset = 0
        face_blocks = []
        for verts, faces, object_id in meshes:
            block = np.empty(len(verts), vertex_type)
            block["x"], block["y"], block["z"] = verts[:, 2], verts[:, 1], verts[:, 0]
            block["object"] = object_id
            fh.write(block.tobytes())
            f = np.empty(len(faces), face_type)
            f["n"] = 3
            f["a"], f["b"], f["c"] = (faces + offset).T
            face_blocks.append(f)
            offset += len(verts)
        for f in face_blocks:
            fh.write(f.tobytes())


def read_ply(path):
    """Read a PLY written by :func:`write_ply`: (vertices z y x, faces, object ids, unit)."""
    with open(path, "rb") as fh:
        data = fh.read()
    end = data.index(b"end_header\n") + len(b"end_header\n")
    header = data[:end].decode("ascii").splitlines()
    n_v = int(next(h.split()[-1] for h in header if h.startswith("element vertex")))
    n_f = int(next(h.split()[-1] for h in header if h.startswith("element face")))
    unit = next(h.split()[-1] for h in header if h.startswith("comment unit"))
    vertex_type = np.dtype([("x", "<f4"), ("y", "<f4"), ("z", "<f4"), ("object", "<i4")])
    face_type = np.dtype([("n", "u1"), ("a", "<i4"), ("b", "<i4"), ("c", "<i4")])
    v = np.frombuffer(data, vertex_type, n_v, end)
    f = np.frombuffer(data, face_type, n_f, end + n_v * vertex_type.itemsize)
    verts = np.stack([v["z"], v["y"], v["x"]], 1)
    return verts, np.stack([f["a"], f["b"], f["c"]], 1), v["object"].copy(), unit


def render_preview(meshes, path, *, title="", unit="nm"):
    """A PNG rendering of meshes (matplotlib, shaded by face orientation)."""
    plt = pyplot()
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection

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
        for setter, c in zip((ax.set_xlim, ax.set_ylim, ax.set_zlim), centre):
            setter(c - half, c + half)
    ax.set_xlabel(f"x ({unit})")
    ax.set_ylabel(f"y ({unit})")
    ax.set_zlabel(f"z ({unit})")
    ax.set_title(title, fontsize=8)
    fig.savefig(path, dpi=90, format="png")
    plt.close(fig)


def meshes_job(
    objects_image,
    measured_table,
    out_ply,
    out_preview,
    *,
    target,
    step=2,
    unit="um",
    preview_objects=12,
):
    """Meshes of every object of one dataset into one PLY; a preview of the largest objects.

    Objects are read from their bounding boxes one at a time.
    """
    import pandas as pd

    from tessera.io.atomic import atomic_path
    from tessera.io.omezarr import open_image

    group, info = open_image(objects_image)
    labels = group[f"labels/{target}/0"]
    table = pd.read_csv(measured_table, sep="\t")
    meshes = []
    for row in table.itertuples(index=False):
        box = np.asarray(labels[row.z0 : row.z1, row.y0 : row.y1, row.x0 : row.x1]) == row.id
        verts, faces = object_mesh(
            box, spacing=info["spacing"], origin=(row.z0, row.y0, row.x0), step=step, unit=unit
        )
        meshes.append((verts, faces, int(row.id)))
    with atomic_path(out_ply) as tmp:
        write_ply(
            tmp, meshes, unit=unit, comment=f"tessera {target} objects, marching cubes step {step}"
        )
    largest = set(table.nlargest(preview_objects, "voxels")["id"]) if len(table) else set()
    with atomic_path(out_preview) as tmp:
        render_preview(
            [m for m in meshes if m[2] in largest],
            tmp,
            unit=unit,
            title=f"{target}: the {len(largest)} largest of {len(table)} objects ({unit})",
        )
    return {"objects": len(meshes), "faces": int(sum(len(m[1]) for m in meshes))}
