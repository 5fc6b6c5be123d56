"""Directions stage: ray directions around the inward normal, low-discrepancy and reproducible.

The lobes themselves (cosine-weighted, uniform; each a sample/pdf/inverse trio) live in
:mod:`thickbake.lobes`; this module draws their variates reproducibly and turns them into world-space
ray directions around each sample's inward normal.

Randomised quasi-Monte Carlo and reproducibility
-------------------------------------------------
Every sample (texel, sub-position, triangle) has a 64-bit key.  The base set is one scrambled Sobol
sequence (scipy.stats.qmc.Sobol, seeded by ``seed``).  A sample's rays form R = :data:`REPLICATES`
independent *replicates*: ray j belongs to replicate r = j mod R and uses base point i = j div R,
shifted by the replicate's own Cranley–Patterson offset, a hash of (seed, key, r), modulo 1
(Cranley & Patterson, SIAM J. Numer. Anal. 13:904, 1976).  Each replicate is thus a randomly shifted
copy of the first n/R points of the net: every point of it is uniform on [0, 1)², so its mean is an
unbiased estimate, and the R replicate means are independent and identically distributed given the
base set.  Their spread is an honest standard error of the estimator actually used (randomised QMC:
Owen, "Scrambled net variance for integrals of smooth functions", Ann. Statist. 25(4):1541, 1997;
L'Ecuyer & Lemieux, "Recent advances in randomized quasi-Monte Carlo methods", in *Modeling
Uncertainty*, Kluwer 2002, random-shift replicates), whereas the independent-sampling formula over
the n rays overstates a net's error several-fold.  Ray ranges that start and stop on multiples of R
cover the same prefix of every replicate, so adaptive batches stay nested.  Nothing depends on
chunking, thread count or order.  ``sequence="random"`` instead hashes (seed, key, ray index) into
independent uniform variates — for comparisons only; its rays are grouped into replicates the same way.
"""

from __future__ import annotations

import functools
import math

import numpy as np

from thickbake.lobes import Lobe, lobe_named

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_TWO_M53 = 1.0 / (1 << 53)


def splitmix64(x: np.ndarray) -> np.ndarray:
    """The splitmix64 finaliser (Steele, Lea & Flood, OOPSLA 2014) applied elementwise to uint64."""
    with np.errstate(over="ignore"):
        z = x + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * _M1
        z = (z ^ (z >> np.uint64(27))) * _M2
        return z ^ (z >> np.uint64(31))


def sample_keys(texel: np.ndarray, sub: np.ndarray, face: np.ndarray) -> np.ndarray:
    """(n,) uint64 key of each surface sample from its texel, sub-position and triangle indices."""
    with np.errstate(over="ignore"):
        k = splitmix64(texel.astype(np.uint64) * np.uint64(1 << 8) + sub.astype(np.uint64))
        return splitmix64(k ^ splitmix64(face.astype(np.uint64) + np.uint64(0xA5A5A5A5)))


def hash_uniform2(seed: int, keys: np.ndarray) -> np.ndarray:
    """(n, 2) float64 uniform variates in [0, 1) from (seed, key), two independent streams."""
    with np.errstate(over="ignore"):
        base = splitmix64(keys ^ splitmix64(np.uint64(seed) + np.zeros(1, np.uint64)))
        h1 = splitmix64(base)
        h2 = splitmix64(base ^ np.uint64(0xD1B54A32D192ED03))
    return np.stack([(h1 >> np.uint64(11)) * _TWO_M53, (h2 >> np.uint64(11)) * _TWO_M53], axis=-1)


@functools.lru_cache(maxsize=16)
def _sobol_cached(count_log2: int, seed: int) -> np.ndarray:
    from scipy.stats import qmc

    points = qmc.Sobol(d=2, scramble=True, rng=np.random.default_rng(seed)).random_base2(count_log2)
    points.setflags(write=False)
    return points


def base_points(count: int, seed: int) -> np.ndarray:
    """(count, 2) float64: the first ``count`` points of the seeded scrambled Sobol sequence.

    Prefixes are nested (the first 16 of a 64-point set are the 16-point set), which adaptive
    sampling relies on; power-of-two counts are balanced (0, m, 2)-nets.
    """
    m = max(0, math.ceil(math.log2(max(count, 1))))
    return _sobol_cached(m, int(seed))[:count]


#: Independent randomisations (replicates) per sample.  Four keep three degrees of freedom for the
#: standard error while each replicate still holds a quarter of the rays, enough for the net to pay off
#: (at 16 rays a replicate is a 4-point net); intervals then use Student-t quantiles with R − 1 = 3
#: degrees of freedom (see :func:`thickbake.pipeline.measures.coverage_factor`).
REPLICATES = 4


def replicate_count(rays: int) -> int:
    """Replicates R for a budget of ``rays`` per sample: :data:`REPLICATES`, or ``rays`` when fewer."""
    return max(1, min(REPLICATES, int(rays)))


def rays_per_sample(rays: int) -> int:
    """Rays actually traced per sample for a request of ``rays``: rounded up to a multiple of R.

    Every replicate gets the same number of points (⌈rays / R⌉), so the R replicate means are
    identically distributed; ``--rays 50`` therefore traces 52.  Powers of two ≥ 4 are unchanged and
    give every replicate a balanced power-of-two net.
    """
    r = replicate_count(rays)
    return -(-int(rays) // r) * r


def replicate_offsets(seed: int, keys: np.ndarray, replicates: int) -> np.ndarray:
    """(n, R, 2) float64 Cranley–Patterson offsets in [0, 1), one per (seed, key, replicate)."""
    rep = splitmix64(np.arange(replicates, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15) + np.uint64(0x51ED))
    with np.errstate(over="ignore"):
        rep_keys = splitmix64(keys.astype(np.uint64)[:, None] ^ rep[None, :])
    return hash_uniform2(seed, rep_keys.reshape(-1)).reshape(len(keys), replicates, 2)


def variates(seed: int, keys: np.ndarray, ray_start: int, ray_stop: int, sequence: str,
             replicates: int = REPLICATES):
    """Uniform variates for rays ``ray_start … ray_stop−1`` of each sample.

    Parameters
    ----------
    seed : int
    keys : (n,) uint64
        Sample keys from :func:`sample_keys`.
    ray_start, ray_stop : int
        Range of ray indices within each sample's sequence (k = stop − start).  Ray j belongs to
        replicate j mod R and is point j div R of that replicate's shifted net.
    sequence : {"sobol", "random"}
    replicates : int
        R, independent randomisations per sample (:func:`replicate_count`).

    Returns
    -------
    u1, u2 : (n, k) float32 each, in [0, 1)
        Kept as two contiguous arrays (not one (n, k, 2) array) so later passes stream memory.
    """
    k = ray_stop - ray_start
    if sequence == "sobol":
        ray = np.arange(ray_start, ray_stop)
        point, rep = ray // replicates, ray % replicates
        base = base_points(int(point[-1]) + 1 if k else 0, seed)[point].astype(np.float32)       # (k, 2)
        offset = replicate_offsets(seed, keys, replicates).astype(np.float32)                  # (n, R, 2)
        out = []
        for d in range(2):
            u = np.take(np.ascontiguousarray(offset[:, :, d]), rep, axis=1)                     # (n, k)
            u += base[None, :, d]
            u -= u >= 1.0
            out.append(u)
        return out[0], out[1]
    ray = np.arange(ray_start, ray_stop, dtype=np.uint64)
    with np.errstate(over="ignore"):
        ray_keys = splitmix64(keys[:, None] * np.uint64(0x100000001B3) + ray[None, :])
    u = hash_uniform2(seed ^ 0x5EED, ray_keys.reshape(-1)).astype(np.float32)
    return u[:, 0].reshape(len(keys), k).copy(), u[:, 1].reshape(len(keys), k).copy()


def lobe_cos_sin(u1: np.ndarray, cone_deg: float, lobe: str | Lobe):
    """cosθ and sinθ (same shape and dtype as ``u1``) of the polar angle drawn from variate u1."""
    return lobe_named(lobe).cos_sin(u1, cone_deg)


def sample_lobe(u: np.ndarray, cone_deg: float, lobe: str | Lobe) -> np.ndarray:
    """Map (…, 2) variates to (…, 3) unit directions in the local frame: :meth:`thickbake.lobes.Lobe.sample`.

    Examples
    --------
    >>> d = sample_lobe(np.array([[0.0, 0.0]]), 90.0, "cosine")
    >>> np.allclose(d, [[0, 0, 1]])
    True
    """
    return lobe_named(lobe).sample(u, cone_deg)


def lobe_pdf(directions: np.ndarray, cone_deg: float, lobe: str | Lobe) -> np.ndarray:
    """Solid-angle density of local directions under the lobe: :meth:`thickbake.lobes.Lobe.pdf`."""
    return lobe_named(lobe).pdf(directions, cone_deg)


def lobe_inverse(directions: np.ndarray, cone_deg: float, lobe: str | Lobe) -> np.ndarray:
    """Inverse of :func:`sample_lobe`: :meth:`thickbake.lobes.Lobe.inverse`."""
    return lobe_named(lobe).inverse(directions, cone_deg)


def orthonormal_frames(normals: np.ndarray):
    """Tangent and bitangent completing each unit normal to a right-handed frame.

    Branchless construction of Duff, Burgess, Christensen, Hery, Kensler, Liani & Villemin,
    "Building an Orthonormal Basis, Revisited", JCGT 6(1), 2017.

    Parameters
    ----------
    normals : (n, 3) float
        Unit vectors.

    Returns
    -------
    tangent, bitangent : (n, 3) each, same dtype
    """
    x, y, z = normals[:, 0], normals[:, 1], normals[:, 2]
    sign = np.where(z >= 0, 1.0, -1.0).astype(normals.dtype)
    a = -1.0 / (sign + z)
    b = x * y * a
    tangent = np.stack([1 + sign * x * x * a, sign * b, -sign * x], axis=1)
    bitangent = np.stack([b, sign + y * y * a, -y], axis=1)
    return tangent, bitangent


def ray_directions(u1: np.ndarray, u2: np.ndarray, axis: np.ndarray, cone_deg: float, lobe: str | Lobe):
    """World-space ray directions for n samples × k rays, built in place in float32.

    Equivalent to ``sample_lobe`` followed by a rotation of local +z onto each sample's ``axis``,
    fused so that every pass streams contiguous (n, k) float32 arrays.

    Parameters
    ----------
    u1, u2 : (n, k) float32
        Variates from :func:`variates`.
    axis : (n, 3) float32
        Unit lobe axis of each sample (the inward normal).
    cone_deg : float
    lobe : Lobe or its name (see :mod:`thickbake.lobes`)

    Returns
    -------
    directions : (n·k, 3) float32, C-contiguous
        Unit vectors, sample-major (ray j of sample i is row i·k + j).
    cos_theta : (n, k) float32
        Cosine between each direction and its axis.
    """
    n, k = u1.shape
    cos_t, sin_t = lobe_named(lobe).cos_sin(u1, cone_deg)
    phi = u2 * np.float32(2 * math.pi)
    cx = np.cos(phi)
    cx *= sin_t
    cy = np.sin(phi, out=phi)
    cy *= sin_t
    axis = axis.astype(np.float32, copy=False)
    tangent, bitangent = orthonormal_frames(axis)
    out = np.empty((n, k, 3), np.float32)
    tmp = np.empty((n, k), np.float32)
    for j in range(3):  # three components, each a full-array pass
        acc = np.multiply(cx, tangent[:, j:j + 1])
        acc += np.multiply(cy, bitangent[:, j:j + 1], out=tmp)
        acc += np.multiply(cos_t, axis[:, j:j + 1], out=tmp)
        out[..., j] = acc
    return out.reshape(-1, 3), cos_t
