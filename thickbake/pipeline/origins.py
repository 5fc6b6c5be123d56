"""Ray origins: where each surface sample's rays start, a small step inside the solid.

A ray that starts exactly on the surface can hit the triangle it starts on; starting ``bias`` inside
along the inward normal avoids that.  Where the solid is thinner than the step, the step itself would
leave the solid, so such samples are found with a probe ray and retried closer to the surface.
"""

from __future__ import annotations

import numpy as np

from thickbake.pipeline.trace import RayEngine

#: Attempts at shrinking an origin's bias (by 4× each) before giving up on it.  1e-4 of the diagonal
#: / 4⁴ is still ~7 float32 ulps of a coordinate of that size, so self-hits stay impossible.
ORIGIN_SHRINK_TRIES = 4


def inward_origins(engine: RayEngine, positions: np.ndarray, normals: np.ndarray, face_normals: np.ndarray, bias: float):
    """Ray origins ``bias`` inside the surface, moved closer wherever that step left the solid.

    Where the solid is thinner than ``bias`` (a sharp rim, a blade edge), stepping ``bias`` along −N
    crosses the opposite surface and rays would start outside.  A probe ray from the origin back along
    +N tells: from inside it leaves through a back face (its normal agrees with the probe), from
    outside it enters through a front face.  Failing samples retry with a quarter of the bias.

    Parameters
    ----------
    engine
        Ray engine over the traced mesh (``first_hit_faces``).
    positions, normals : (n, 3) float64
        Surface points and the outward unit normals to step against, scene units.  The bake passes
        the normal of the face each sample lies on, so every origin lies behind its own face plane
        whatever the tilt of the shading normal.
    face_normals : (f, 3) float64
        Outward unit normals of the traced triangles.
    bias : float
        Scene units.

    Returns
    -------
    origins : (n, 3) float32
    sample_bias : (n,) float32
        The offset used per sample (``bias`` or a quarter of it, a sixteenth, ...).
    unresolved : int
        Samples whose probe still entered a front face at the smallest bias tried.
    """
    sample_bias = np.full(len(positions), bias, dtype=np.float64)
    origins = (positions - sample_bias[:, None] * normals).astype(np.float32)
    if bias <= 0 or len(positions) == 0:
        return origins, sample_bias.astype(np.float32), 0
    todo = np.arange(len(positions))
    for attempt in range(ORIGIN_SHRINK_TRIES + 1):
        probe = np.ascontiguousarray(normals[todo], dtype=np.float32)
        _, hit, face = engine.first_hit_faces(origins[todo], probe, float(3 * sample_bias[todo].max()))
        entered = hit & (np.einsum("ij,ij->i", probe, face_normals[np.maximum(face, 0)]) < 0)
        todo = todo[entered]
        if len(todo) == 0 or attempt == ORIGIN_SHRINK_TRIES:
            break
        sample_bias[todo] *= 0.25
        origins[todo] = (positions[todo] - sample_bias[todo, None] * normals[todo]).astype(np.float32)
    return origins, sample_bias.astype(np.float32), int(len(todo))
