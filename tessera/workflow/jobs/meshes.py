"""The meshes rule: surface meshes of one dataset's objects into one PLY, and a preview."""

from tessera.io.atomic import atomic_path
from tessera.io.omezarr import open_image
from tessera.io.ply import write_ply
from tessera.meshes import object_meshes, render_preview
from tessera.workflow.files.object_table import read_object_table


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
    group, info = open_image(objects_image)
    labels = group[f"labels/{target}/0"]
    table = read_object_table(measured_table)
    meshes = object_meshes(labels, table, spacing=info["spacing"], step=step, unit=unit)
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
