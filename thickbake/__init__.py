"""thickbake: bake thickness maps for real-time translucency on the CPU.

>>> import thickbake
>>> result = thickbake.bake("samples/candle.glb", size=256, rays=32)   # doctest: +SKIP
>>> result.write("candle_thickness.png")                               # doctest: +SKIP

The heavy modules load on first use, so ``thickbake --help`` answers at once.
"""

from thickbake.errors import ThickbakeError
from thickbake.version import __version__

__all__ = ["__version__", "bake", "bake_maps", "BakeResult", "BakeSettings", "MapKey", "ThickbakeError"]


def __getattr__(name):
    if name == "BakeSettings":
        from thickbake.settings import BakeSettings

        return BakeSettings
    if name == "MapKey":
        from thickbake.pipeline.groups import MapKey

        return MapKey
    if name in ("bake", "bake_maps", "BakeResult"):
        from thickbake.pipeline import driver

        return getattr(driver, name)
    raise AttributeError(f"module 'thickbake' has no attribute {name!r}")
