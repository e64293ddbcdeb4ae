"""Meshes: physical placement and units, PLY round trip, decimation, bad requests."""

import math
import struct

import numpy as np
import pytest
from skimage.draw import ellipsoid
from skimage.measure import mesh_surface_area

from tessera.errors import TesseraInputError
from tessera.io.ply import read_ply, write_ply
from tessera.meshes import object_mesh, render_preview


def ball(radius_vox):
    n = radius_vox + 2
    zz, yy, xx = np.ogrid[-n : n + 1, -n : n + 1, -n : n + 1]
    return zz**2 + yy**2 + xx**2 <= radius_vox**2


def enclosed_volume(verts, faces):
    """Volume inside a closed triangle mesh by the divergence theorem: the sum over faces of the
    signed tetrahedra (origin, a, b, c), det[a b c] / 6 (common practice). Sign = winding."""
    tri = np.asarray(verts, np.float64)[faces]
    return float(np.einsum("ij,ij->i", tri[:, 0], np.cross(tri[:, 1], tri[:, 2])).sum() / 6)


def edge_use_counts(faces):
    """How many faces share each undirected edge (2 for every edge of a closed surface)."""
    edges = np.sort(np.asarray(faces)[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    return np.unique(edges, axis=0, return_counts=True)[1]


def test_mesh_matches_scikit_image_and_sits_in_the_volume():
    # Independent facts about the mesh of an ellipsoid with semi-axes 300, 500, 700 nm along
    # z y x on 40 x 10 x 10 nm voxels (mask from skimage.draw.ellipsoid, same z y x convention):
    # - enclosed volume (divergence theorem, plain numpy) = 4/3 pi a b c, within 2 %;
    # - extent along z, y, x = 2a, 2b, 2c to within one voxel of that axis, in um, so the axes
    #   keep the z y x order of the documented vertices and each carries its own spacing;
    # - every vertex within the object's physical box in the volume: voxel i of the box sits at
    #   (origin + i) * spacing, and the 0.5 level lies within half a voxel of the object's voxels;
    # - the surface is closed: every edge is shared by exactly two faces.
    a, b, c = 300, 500, 700
    spacing = np.array([40.0, 10.0, 10.0])
    origin = np.array([5, 100, 200])
    mask = ellipsoid(a, b, c, spacing=tuple(spacing))
    verts, faces = object_mesh(mask, spacing=tuple(spacing), origin=tuple(origin), unit="um")
    assert verts.shape[1] == 3 and faces.shape[1] == 3
    volume_um3 = abs(enclosed_volume(verts, faces))
    assert volume_um3 == pytest.approx(4 / 3 * math.pi * a * b * c / 1e9, rel=0.02)
    extent = verts.max(axis=0) - verts.min(axis=0)
    assert (np.abs(extent * 1000 - 2 * np.array([a, b, c])) <= spacing + 0.01).all()
    where = np.argwhere(mask)
    low = (origin + where.min(axis=0) - 0.5) * spacing / 1000
    high = (origin + where.max(axis=0) + 0.5) * spacing / 1000
    assert (verts >= low - 1e-6).all() and (verts <= high + 1e-6).all()
    centre = (origin + (np.array(mask.shape) - 1) / 2) * spacing / 1000
    np.testing.assert_allclose(verts.mean(axis=0), centre, atol=0.01)
    assert set(edge_use_counts(faces).tolist()) == {2}
    # the same object in nm: the same mesh scaled by 1000
    verts_nm, faces_nm = object_mesh(mask, spacing=tuple(spacing), origin=tuple(origin), unit="nm")
    np.testing.assert_array_equal(faces_nm, faces)
    np.testing.assert_allclose(verts_nm, verts * 1000, rtol=1e-5)


def test_decimation_reduces_faces_and_keeps_the_size():
    mask = ball(12)
    full = object_mesh(mask, spacing=(10, 10, 10), unit="nm")
    coarse = object_mesh(mask, spacing=(10, 10, 10), step=3, unit="nm")
    assert len(coarse[1]) < len(full[1]) / 4
    extent = lambda v: v.max(axis=0) - v.min(axis=0)  # noqa: E731
    assert extent(coarse[0]) == pytest.approx(extent(full[0]), rel=0.15)
    # analytic sphere surface 4 pi r^2 (r = 120 nm), within the staircase bias of a hard mask
    assert mesh_surface_area(*full) == pytest.approx(4 * math.pi * 120**2, rel=0.12)


def test_ply_round_trip_keeps_vertices_faces_ids_and_unit(tmp_path):
    a = object_mesh(ball(4), spacing=(40, 8, 8), unit="um")
    b = object_mesh(ball(3), spacing=(40, 8, 8), origin=(0, 50, 50), unit="um")
    path = tmp_path / "objects.ply"
    write_ply(path, [(*a, 7), (*b, 9)], unit="um")
    verts, faces, ids, unit = read_ply(path)
    assert unit == "um" and len(verts) == len(a[0]) + len(b[0])
    np.testing.assert_array_equal(verts[: len(a[0])], a[0])
    np.testing.assert_array_equal(faces[len(a[1]) :], b[1] + len(a[0]))
    assert set(ids[: len(a[0])]) == {7} and set(ids[len(a[0]) :]) == {9}
    render_preview([(*a, 7)], tmp_path / "preview.png", unit="um")
    assert (tmp_path / "preview.png").read_bytes()[:4] == b"\x89PNG"


# PLY scalar types and their sizes (the PLY format of Greg Turk, 1994; common practice), as
# struct codes: a reader that follows the header, not tessera's own reader.
PLY_TYPES = {
    "char": "b", "uchar": "B", "short": "h", "ushort": "H",
    "int": "i", "uint": "I", "float": "f", "double": "d",
}  # fmt: skip


def parse_binary_ply(data):
    """Header comments, and per element a list of records (tuples in the declared property
    order), read with struct from the byte order and properties the header declares."""
    end = data.index(b"end_header\n") + len(b"end_header\n")
    lines = data[:end].decode("ascii").splitlines()
    assert lines[0] == "ply"
    fmt = lines[1].split()
    assert fmt[0] == "format" and fmt[2] == "1.0"
    order = {"binary_little_endian": "<", "binary_big_endian": ">"}[fmt[1]]
    elements, comments = [], []
    for line in lines[2:-1]:
        words = line.split()
        if words[0] == "comment":
            comments.append(line[len("comment ") :])
        elif words[0] == "element":
            elements.append((words[1], int(words[2]), []))
        elif words[0] == "property":
            elements[-1][2].append(words[1:])
    offset, out = end, {}
    for name, count, props in elements:
        records = []
        for _ in range(count):
            record = []
            for prop in props:
                if prop[0] == "list":
                    (n,) = struct.unpack_from(order + PLY_TYPES[prop[1]], data, offset)
                    offset += struct.calcsize(PLY_TYPES[prop[1]])
                    code = order + str(n) + PLY_TYPES[prop[2]]
                    record.append(struct.unpack_from(code, data, offset))
                else:
                    code = order + PLY_TYPES[prop[0]]
                    (value,) = struct.unpack_from(code, data, offset)
                    record.append(value)
                offset += struct.calcsize(code)
            records.append(tuple(record))
        out[name] = ([p[-1] for p in props], records)
    assert offset == len(data)  # nothing left over: sizes and counts agree with the header
    return fmt[1], comments, out


def test_ply_file_follows_its_header(tmp_path):
    # The file is parsed here from its header alone (byte order, property types and order), so a
    # byte-order or axis-order error shared by tessera's writer and reader shows. The module
    # documents vertices written x y z from tessera's z y x, each with its object id.
    a = object_mesh(ball(3), spacing=(40, 8, 8), unit="um")
    b = object_mesh(ball(2), spacing=(40, 8, 8), origin=(2, 50, 70), unit="um")
    path = tmp_path / "objects.ply"
    write_ply(path, [(*a, 7), (*b, 9)], unit="um")
    fmt, comments, elements = parse_binary_ply(path.read_bytes())
    assert fmt == "binary_little_endian" and "unit um" in comments
    names, records = elements["vertex"]
    assert names == ["x", "y", "z", "object"]
    xyz = np.array([r[:3] for r in records], np.float32)
    zyx = np.concatenate([a[0], b[0]])
    np.testing.assert_array_equal(xyz, zyx[:, ::-1])
    assert [r[3] for r in records] == [7] * len(a[0]) + [9] * len(b[0])
    names, records = elements["face"]
    assert names == ["vertex_indices"]
    triangles = np.array([r[0] for r in records])
    np.testing.assert_array_equal(triangles, np.concatenate([a[1], b[1] + len(a[0])]))
    # and the placement survives: object b (centre 4 voxels into its 9-voxel box) in x y z um
    centre_b = xyz[len(a[0]) :].mean(axis=0)
    np.testing.assert_allclose(centre_b, (np.array([70, 50, 2]) + 4) * [8, 8, 40] / 1000, atol=0.01)


def test_bad_mesh_requests_are_refused():
    with pytest.raises(TesseraInputError, match="cannot make a mesh of an empty object"):
        object_mesh(np.zeros((4, 4, 4), bool), spacing=(1, 1, 1))
    with pytest.raises(TesseraInputError, match="mesh unit must be one of nm, um"):
        object_mesh(ball(2), spacing=(1, 1, 1), unit="mm")


def test_objects_thinner_than_the_step_still_get_a_mesh():
    thin = np.zeros((3, 9, 9), bool)
    thin[1, 4, 2:7] = True  # one voxel thick: no surface on a grid of step 3
    verts, faces = object_mesh(thin, spacing=(40, 8, 8), step=3)
    assert len(faces) > 0
