"""Test-session set-up shared by every test file.

Tests that run ``python -m thickbake`` in a subprocess must run the checkout under test, not whatever
copy of the package happens to be installed (a stale ``pip install .`` would otherwise answer them).
"""

from __future__ import annotations

import os
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
_rest = [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p and Path(p).resolve() != ROOT]
os.environ["PYTHONPATH"] = os.pathsep.join([str(ROOT), *_rest])
