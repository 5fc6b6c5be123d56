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
#: Triangles whose area is below (this × diagonal)² count as degenerate (load): float64 cross products
#: of unit-scale corners resolve areas down to ~1e-16, so 1e-9 of the diagonal squared (1e-18) is well
#: inside round-off of a zero area and far below any real triangle.
DEGENERATE_AREA_FRACTION = 1e-9
#: A mesh whose extent is below this many float64 ulps of its largest coordinate has lost its shape
#: to rounding before thickbake sees it (load): 2²⁰ ulps leave ~6 significant digits of the shape.
MIN_EXTENT_ULPS = 2.0**20
#: Smallest and largest bounding-box diagonal, scene units, the load accepts: float32 handles
#: magnitudes from ~1.2e-38 to ~3.4e38, and squared distances inside the ray engine must stay finite
#: and normal, so the extent must lie well inside the square root of that range.
FLOAT32_EXTENT_RANGE = (1e-15, 1e15)
#: Relative spread below which scales count as one uniform scale (unitless): the singular values of
#: a node transform (glTF reader), the node scales of the faces one map covers (map groups) and of a
#: material's instances (glTF write-back).  float32 node matrices composed over a few levels carry
#: ~1e-7 relative error each, and a 1e-5 difference changes a thickness factor by less than half a
#: 16-bit code step (1.5e-5).
UNIFORM_SCALE_TOLERANCE = 1e-5
#: Default search distance of a bake measured in a source solid (pipeline.transfer), as a fraction
#: of the *target's* bounding-box diagonal.  It must exceed the gap between the target and the
#: source, whose typical size is the facet sag of the low-polygon target, R·(1 − cos(π/n)) for n
#: segments around a round part of radius R: 3.9% of the diagonal (2√3·R of a sphere's box) for a
#: six-segment sphere, 0.6% for sixteen segments.  It must also stay below half the thickness of the
#: thinnest part, or a search could pass through the part and match its far side (which the facing
#: test then rejects, leaving the sample unprojected instead of wrong).  5% covers even six-segment
#: round parts.  Judgement, no published source.
SEARCH_DIAGONAL_FRACTION = 0.05
#: float32 round-off of ray origins, directions and hit distances, in ulps of the bounding-box
#: diagonal (checks.error_budget): a handful of roundings of at most half an ulp each, so 8 ulps of
#: 2⁻²⁴ relative each bound them.
FLOAT32_ULPS = 8
#: One float32 ulp relative to the value (2⁻²⁴: half the spacing at 1, the unit round-off of a
#: 24-bit significand).
FLOAT32_EPS = 2.0 ** -24
#: Leak guard (pipeline.trace): hits closer than this many float32 ulps (2⁻²³ relative) of the scene's
#: largest absolute coordinate to an edge of their triangle are re-traced in the robust scene.  Both
#: Embree's fast edge tests and the plane arithmetic work in float32 on coordinates of that size,
#: each with errors of a few ulps; 64 leaves an order of magnitude of room.
EDGE_MARGIN_ULPS = 64
#: A ray still travelling after the bounding-box diagonal plus this share of it has left the mesh
#: (pipeline.driver counts it as an escape): no chord of a solid inside its box is longer than the
#: diagonal; the margin absorbs round-off.
ESCAPE_MARGIN = 1e-3
