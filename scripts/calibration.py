#!/usr/bin/env python3
"""Print the calibration table of thickbake's per-texel error bars (also part of scripts/bench.py).

For the fine sphere (closed form) and the shell-and-ball body (a 32x-ray reference bake), at 16, 64 and
256 rays, cosine and uniform lobes, cones 30° and 90°: the share of covered texels whose actual error
lies within the stated 95% band (±t_{0.975,3}·σ̂) and the 68.3% band (±t_{0.841,3}·σ̂).  See
thickbake/checks/calibration.py for the method.

    python scripts/calibration.py            # ~30 s on 2 cores
    python scripts/calibration.py --json cal.json
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from thickbake.checks.calibration import calibration_table, table_lines  # noqa: E402
from thickbake.maps.files import atomic_write_bytes  # noqa: E402


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--json", metavar="FILE", help="write the rows as JSON")
    args = parser.parse_args(argv)
    rows = calibration_table()
    print("\n".join(table_lines(rows)))
    if args.json:
        atomic_write_bytes(args.json, (json.dumps([r.to_dict() for r in rows], indent=2) + "\n").encode())
    return 0


if __name__ == "__main__":
    sys.exit(main())
