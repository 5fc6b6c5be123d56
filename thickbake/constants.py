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
#: Vertices closer than this fraction of the bounding-box diagonal are merged for tracing.  Seam
#: duplicates are usually bit-identical; 1e-7 absorbs float round-off of exporters and transforms
#: while staying far below any real feature size.
MERGE_TOLERANCE_FRACTION = 1e-7
#: Samples are kept this many biases away from the edges of their triangle (texels.keep_off_edges):
#: enough for the inward bias step not to cross the neighbouring face at edges sharper than 90°,
#: down to wedges of atan(1/4) ≈ 14°; thinner places are handled by origins.inward_origins.
EDGE_MARGIN_BIASES = 4.0
#: Step off a face, as a fraction of the bounding-box diagonal, before a parity ray starts (mesh
#: checks): the same margin over float32 round-off as the default bias.
PARITY_STEP_FRACTION = 1e-4
#: Interpolated or averaged normals shorter than this (unit vectors, so unitless) are degenerate —
#: opposite normals cancelled — and the face normal is used instead.
DEGENERATE_NORMAL_LENGTH = 1e-12
#: A reach counts as covering the bounding-box diagonal down to this relative shortfall: a reach
#: typed from a printed diagonal loses ~1e-16 relative, far inside it.
REACH_DIAGONAL_RELATIVE_SLACK = 1e-9
