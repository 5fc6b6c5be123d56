"""Padding stage: grow UV islands into the empty texels around them.

Texture filtering and mip-mapping blend a texel with its neighbours, so texels just outside an island
must hold island values or seams show a dark halo.  Each empty texel within ``pad`` texels (Euclidean
distance between texel centres) of a covered texel takes the value of its nearest covered texel;
``"fill"`` fills every empty texel.  Covered texels are never changed.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def pad_map(values: np.ndarray, covered: np.ndarray, pad: int | str) -> tuple[np.ndarray, np.ndarray]:
    """Dilate covered texels into empty ones.

    Parameters
    ----------
    values : (h, w) float
        Map values; only covered texels are read.
    covered : (h, w) bool
    pad : int or "fill"
        Padding width in texels (0 = none) or ``"fill"``.

    Returns
    -------
    padded : (h, w) same dtype as ``values``
    filled : (h, w) bool
        Covered texels plus the ones padding wrote.

    Examples
    --------
    >>> v = np.array([[0., 5., 0.]]); c = np.array([[False, True, False]])
    >>> pad_map(v, c, 1)[0].tolist()
    [[5.0, 5.0, 5.0]]
    """
    if not covered.any() or pad == 0:
        return values.copy(), covered.copy()
    distance, (rows, cols) = ndimage.distance_transform_edt(~covered, return_indices=True)
    take = ~covered if pad == "fill" else (~covered) & (distance <= float(pad))
    padded = values.copy()
    padded[take] = values[rows[take], cols[take]]
    return padded, covered | take
