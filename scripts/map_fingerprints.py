#!/usr/bin/env python3
"""Fingerprint the maps of the bundled samples and the analytic shapes under every measure.

Run it before and after a change that must not alter any map (a refactor, a speed-up) and diff the
two outputs: every line is ``asset measure sha256-of-pixels``.  It drives the command line, so it
works across changes of the package's internal layout.

    python3 scripts/map_fingerprints.py > before.txt
    ... change the code ...
    python3 scripts/map_fingerprints.py > after.txt && diff before.txt after.txt
"""

from __future__ import annotations

import argparse
import hashlib
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
MEASURES = ("thickness", "transmittance", "occlusion")


def pixels_sha(path: Path) -> str:
    if path.suffix == ".tif":
        data = np.asarray(Image.open(path), dtype=np.float32)
    else:
        data = np.asarray(Image.open(path))
    return hashlib.sha256(np.ascontiguousarray(data).tobytes()).hexdigest()[:16]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="96")
    parser.add_argument("--rays", default="16")
    args = parser.parse_args(argv)
    cli = [sys.executable, "-m", "thickbake"]
    # the checkout this script lives in, whatever the working folder or an installed copy
    os.environ["PYTHONPATH"] = os.pathsep.join([str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])])
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        subprocess.run(cli + ["shapes", str(tmp / "shapes")], check=True, capture_output=True)
        assets = sorted((ROOT / "samples").rglob("*.glb")) + sorted((ROOT / "samples").rglob("*.obj"))
        assets += sorted((tmp / "shapes").glob("*.obj"))
        for asset in assets:
            for measure in MEASURES:
                for suffix in (".png", ".tif"):
                    out = tmp / f"{asset.stem}.{measure}.{suffix[1:]}{suffix}"
                    extra = ["--seed", "3"] if measure == "occlusion" else []
                    subprocess.run(cli + ["bake", str(asset), "-o", str(out), "--size", args.size, "--rays", args.rays,
                                          "--measure", measure, "-q"] + extra, check=True, capture_output=True)
                    print(f"{asset.relative_to(asset.parents[1]) if asset.is_relative_to(ROOT) else asset.name} "
                          f"{measure} {suffix[1:]} {pixels_sha(out)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
