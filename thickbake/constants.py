"""Tolerances, in one place, each with why it has the value it has.

Scale-relative ones are fractions of the mesh's bounding-box diagonal (scene units follow the mesh, so
an absolute tolerance would be wrong for either a ring or a building).  Nothing here changes a map
when moved: each name is the value the code used before it was gathered here.
"""

from __future__ import annotations

#: Slack when testing whether a direction lies inside a cone (on cosines, unitless): directions built
#: exactly on the cone's edge may round to a cosine a few float64 ulps below cos α.
CONE_EDGE_COS_TOLERANCE = 1e-12

#: Default inward origin offset (``bias``) as a fraction of the bounding-box diagonal.  float32
#: positions carry a relative rounding error of ~6e-8, so 1e-4 of the diagonal clears self-hits with
#: three orders of magnitude to spare while staying far below any thickness worth baking.
BIAS_DIAGONAL_FRACTION = 1e-4
#: Default Beer–Lambert attenuation distance as a fraction of the bounding-box diagonal: light falls to
#: 1/e over a tenth of the object, so thin parts glow and the body stays dark.  Common practice, no
#: published source.
ATTENUATION_DIAGONAL_FRACTION = 0.1
