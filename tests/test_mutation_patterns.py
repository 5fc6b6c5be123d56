"""scripts/mutation_checks.py still finds the code it breaks.

The mutation checks match source text exactly; a refactor that rewrites that code would otherwise
leave the script stopping with "not found" only when someone runs it.  This test makes the refactor
update the pattern in the same change (it does not run the mutations: that takes minutes).
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
_spec = importlib.util.spec_from_file_location("mutation_checks", ROOT / "scripts" / "mutation_checks.py")
mutation_checks = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("mutation_checks", mutation_checks)   # dataclasses look their module up there
_spec.loader.exec_module(mutation_checks)


@pytest.mark.parametrize("mutation", mutation_checks.MUTATIONS, ids=lambda m: m.name)
def test_each_mutation_applies_exactly_once(mutation):
    for path, old, _new in ((mutation.path, mutation.old, mutation.new), *mutation.also):
        target = ROOT / path
        assert target.is_file(), f"{path} is gone: update mutation '{mutation.name}' in scripts/mutation_checks.py"
        if old is not None:
            count = target.read_text(encoding="utf-8").count(old)
            assert count == 1, (f"mutation '{mutation.name}': {old!r} occurs {count} times in {path}; the code "
                                "changed, so update the pattern in scripts/mutation_checks.py")
    for test in mutation.tests:
        assert (ROOT / test.split("::")[0]).is_file(), f"mutation '{mutation.name}' names a missing test file {test}"
