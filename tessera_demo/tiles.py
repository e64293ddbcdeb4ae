"""Annotation tiles of a demo dataset: where the painted and held-out tiles lie."""

from tessera.errors import TesseraInputError

__all__ = ["TARGETS", "choose_tiles"]

#: The generator's annotated targets (the organelles it renders truth for), in the order
#: tiles are written.
TARGETS = ("mitochondria", "nuclei")


def choose_tiles(rng, out, bad, dataset, size, n_painted, n_heldout):
    """Painted and held-out tile centres per target, away from defects and from each other.

    Parameters
    ----------
    rng : numpy.random.Generator
        The dataset's ``tiles`` stream.
    out : dict
        A render (:func:`tessera_demo.render.render_dataset`): ``raw`` and one label volume
        per name in :data:`TARGETS`.
    bad : set of int
        Defective sections; no tile lies on them.
    dataset : str
        Dataset name, the first part of every ``tile_id``.
    size : int
        Side of the square tiles in pixels.
    n_painted, n_heldout : int
        Tiles per target for training and for accuracy. Held-out tiles come from the first
        third of the sections in a random direction, painted ones from sections at least 3
        away from every held-out section.

    Returns
    -------
    list of dict
        ``tile_id``, ``target``, ``z``, ``y``, ``x`` (centre) and ``set`` (painted, heldout).

    Examples
    --------
    >>> import numpy as np
    >>> labels = np.zeros((12, 32, 32), dtype=np.uint16)
    >>> labels[:, 8:20, 8:20] = 1
    >>> out = {"raw": labels.astype(np.uint8), "mitochondria": labels, "nuclei": labels}
    >>> tiles = choose_tiles(np.random.default_rng(0), out, {5}, "tn1", 16, 2, 1)
    >>> [t["tile_id"] for t in tiles if t["target"] == "nuclei"]
    ['tn1-nucl-p01', 'tn1-nucl-p02', 'tn1-nucl-h01']
    >>> any(t["z"] == 5 for t in tiles)
    False
    """
    nz = out["raw"].shape[0]
    usable = [z for z in range(nz) if z not in bad]
    tiles = []
    for target in TARGETS:
        mask = out[target] > 0
        zs = usable if rng.random() < 0.5 else usable[::-1]
        if n_heldout:
            held = zs[: max(1, len(zs) // 3)]
            painted = [z for z in zs if all(abs(z - h) >= 3 for h in held)]
        else:
            held, painted = [], list(zs)
        if not painted:
            raise TesseraInputError(
                f"shape {out['raw'].shape} is too thin for painted and held-out tiles 3 "
                "sections apart"
            )
        chosen = []
        for kind, pool, count in (("painted", painted, n_painted), ("heldout", held, n_heldout)):
            for k in range(count):
                z, y, x = _pick_centre(rng, mask, pool, size, chosen)
                chosen.append((z, y, x))
                tiles.append(
                    {
                        "tile_id": f"{dataset}-{target[:4]}-{kind[0]}{k + 1:02d}",
                        "target": target,
                        "z": z,
                        "y": y,
                        "x": x,
                        "set": kind,
                    }
                )
    return tiles


def _pick_centre(rng, mask, pool, size, chosen, n_candidates=64):
    """A tile centre that shows both the target and background where possible."""
    _, ny, nx = mask.shape
    half = size // 2
    zc = rng.choice(pool, n_candidates)
    yc = rng.integers(half, ny - size + half + 1, n_candidates)
    xc = rng.integers(half, nx - size + half + 1, n_candidates)
    best, best_score = None, -1.0
    for z, y, x in zip(zc, yc, xc, strict=True):
        z, y, x = int(z), int(y), int(x)
        frac = float(mask[z, y - half : y - half + size, x - half : x - half + size].mean())
        score = min(frac, 1 - frac)
        near = any(cz == z and abs(cy - y) < half and abs(cx - x) < half for cz, cy, cx in chosen)
        if near:
            score -= 1.0
        if score >= 0.1:
            return z, y, x
        if score > best_score:
            best, best_score = (z, y, x), score
    return best
