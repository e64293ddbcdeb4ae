"""Meshes: physical placement and units, PLY round trip, decimation, bad requests."""

import math

import numpy as np
import pytest
from skimage.measure import marching_cubes, mesh_surface_area

from tessera.errors import TesseraInputError
from tessera.io.ply import read_ply, write_ply
from tessera.meshes import object_mesh, render_preview


def ball(radius_vox):
    n = radius_vox + 2
    zz, yy, xx = np.ogrid[-n : n + 1, -n : n + 1, -n : n + 1]
    return zz**2 + yy**2 + xx**2 <= radius_vox**2


def test_mesh_matches_scikit_image_and_sits_in_the_volume():
    # Reference: skimage.measure.marching_cubes with the same spacing; ours is shifted to the
    # object's place in the volume and scaled to um.
    mask = ball(10)
    verts, faces = object_mesh(mask, spacing=(40, 10, 10), origin=(5, 100, 200), unit="um")
    ref_v, ref_f, _, _ = marching_cubes(
        np.pad(mask.astype(np.float32), 1), level=0.5, spacing=(40, 10, 10)
    )
    assert mesh_surface_area(verts, faces) == pytest.approx(mesh_surface_area(ref_v, ref_f) / 1e6)
    centre = verts.mean(axis=0)
    expected = (np.array([5, 100, 200]) + 12) * np.array([40, 10, 10]) / 1000
    assert centre == pytest.approx(expected, abs=0.01)


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
