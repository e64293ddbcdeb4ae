"""Binary little-endian PLY, a plain mesh format every viewer reads, with the unit in a comment.

One file holds the meshes of many objects: each vertex carries its object id (``int object``)
so a viewer can colour objects apart. Vertices are written x y z; arrays in tessera are z y x.
"""

import numpy as np

VERTEX = np.dtype([("x", "<f4"), ("y", "<f4"), ("z", "<f4"), ("object", "<i4")])
FACE = np.dtype([("n", "u1"), ("a", "<i4"), ("b", "<i4"), ("c", "<i4")])


def write_ply(path, meshes, *, unit="nm", comment=""):
    """Write meshes ``[(vertices z y x, faces, object id), ...]`` to one binary PLY, x y z order.

    Each vertex carries its object id, so a viewer can colour objects apart.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "one.ply"
    >>> triangle = np.array([[0, 0, 0], [0, 1, 0], [0, 0, 1]], np.float32)
    >>> write_ply(path, [(triangle, np.array([[0, 1, 2]]), 7)], unit="um")
    >>> path.read_bytes().split(b"end_header")[0].decode().splitlines()[:4]
    ['ply', 'format binary_little_endian 1.0', 'comment unit um', 'element vertex 3']
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
    with open(path, "wb") as fh:
        fh.write(("\n".join(header) + "\n").encode("ascii"))
        offset = 0
        face_blocks = []
        for verts, faces, object_id in meshes:
            block = np.empty(len(verts), VERTEX)
            block["x"], block["y"], block["z"] = verts[:, 2], verts[:, 1], verts[:, 0]
            block["object"] = object_id
            fh.write(block.tobytes())
            f = np.empty(len(faces), FACE)
            f["n"] = 3
            f["a"], f["b"], f["c"] = (faces + offset).T
            face_blocks.append(f)
            offset += len(verts)
        for f in face_blocks:
            fh.write(f.tobytes())


def read_ply(path):
    """Read a PLY written by :func:`write_ply`: (vertices z y x, faces, object ids, unit).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "one.ply"
    >>> triangle = np.array([[0, 0, 0], [0, 1, 0], [0, 0, 1]], np.float32)
    >>> write_ply(path, [(triangle, np.array([[0, 1, 2]]), 7)], unit="um")
    >>> verts, faces, ids, unit = read_ply(path)
    >>> np.array_equal(verts, triangle), faces.tolist(), ids.tolist(), unit
    (True, [[0, 1, 2]], [7, 7, 7], 'um')
    """
    with open(path, "rb") as fh:
        data = fh.read()
    end = data.index(b"end_header\n") + len(b"end_header\n")
    header = data[:end].decode("ascii").splitlines()
    n_v = int(next(h.split()[-1] for h in header if h.startswith("element vertex")))
    n_f = int(next(h.split()[-1] for h in header if h.startswith("element face")))
    unit = next(h.split()[-1] for h in header if h.startswith("comment unit"))
    v = np.frombuffer(data, VERTEX, n_v, end)
    f = np.frombuffer(data, FACE, n_f, end + n_v * VERTEX.itemsize)
    verts = np.stack([v["z"], v["y"], v["x"]], 1)
    return verts, np.stack([f["a"], f["b"], f["c"]], 1), v["object"].copy(), unit
