"""From a probability map to globally labelled objects, block by block.

The steps, in order (every one defined on the whole volume, computed out of core):

1. *Mask*: voxels with probability >= `low`.
2. *Morphology*: binary opening then closing with an ellipsoid of the given radius in nm (round
   in physical space, so anisotropic voxels get fewer voxels along z). Outside the volume counts
   as background for the opening and as foreground for the closing, so objects cut by the
   volume edge are neither eroded nor grown there.
3. *Hysteresis*: keep the connected components of the mask that hold at least one voxel with
   probability >= `high` (``low == high`` is a plain global threshold).
4. *Holes*: background cavities enclosed by one object (6-connected background) are filled,
   unless filling would touch another object.
5. *Size*: objects with a volume outside [`min_volume_um3`, `max_volume_um3`] are removed, by
   their whole volume (an object spanning many blocks is measured once).
6. *Split* (optional, ``split_min_depth_nm``): each kept object, whole in its bounding box with
   its filled cavities, is split into the organelles it holds by a seeded watershed on its
   distance transform in nm (:mod:`~tessera.objects.split`); with ``split_valley_probability``
   the distance is first scaled by the probability, so a probability valley between organelles
   pressed together adds a cut where the mask has no neck. Objects whose box exceeds
   ``split_max_voxels`` stay whole and are flagged (``split_checked`` False). The size range
   applies to the objects before they are split; a piece below `min_volume_um3` is a fragment
   and joins the pieces around it (its seed is dropped and the watershed run again).
7. *Labels*: objects are numbered 1..N in raster order of their first voxel, which is what
   ``scipy.ndimage.label`` does on a volume held in memory (without splitting).

Out of core: each block is read with a halo of the morphology's reach, labelled on its own, and
labels that touch across block faces (with the stated connectivity) are merged with a graph's
connected components (``scipy.sparse.csgraph``, a union-find in effect). Memory grows with the
block size and the number of objects, never with the volume.

:mod:`~tessera.objects.label` runs the steps (:func:`~tessera.objects.label.label_objects`),
:mod:`~tessera.objects.morphology` holds the structuring elements and the in-memory mask, and
:mod:`~tessera.objects.split` the separation of one object, and ``_passes`` the passes over the
volume. This file imports nothing, so a job hashes only
the parts it runs.
"""
