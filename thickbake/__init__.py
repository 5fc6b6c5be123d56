"""thickbake: bake thickness maps for real-time translucency on the CPU.

>>> import thickbake
>>> result = thickbake.bake("samples/candle.glb", size=256, rays=32)   # doctest: +SKIP
>>> result.write("candle_thickness.png")                               # doctest: +SKIP
"""

__version__ = "0.1.0"

from .errors import ThickbakeError  # noqa: E402
from .settings import BakeSettings  # noqa: E402
from .bake import BakeResult, bake  # noqa: E402

__all__ = ["__version__", "bake", "BakeResult", "BakeSettings", "ThickbakeError"]
