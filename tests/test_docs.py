"""README stays true to the code: every module has its line in "Layout", every option is documented."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from thickbake.cli.main import main

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def layout_entries() -> set[str]:
    """Paths listed in the code block of README's "Layout" section, e.g. ``thickbake/maps/encode.py``."""
    section = README[README.index("## Layout"):]
    block = section[section.index("```") + 3:]
    block = block[block.index("\n") + 1:block.index("```")]
    found, folders = set(), {}
    for line in block.splitlines():
        if not line.strip():
            continue
        indent = len(line) - len(line.lstrip())
        name = line.split()[0]
        parent = "/".join(folders[i] for i in sorted(folders) if i < indent)
        if name.endswith("/"):
            folders = {i: f for i, f in folders.items() if i < indent}
            folders[indent] = name.rstrip("/")
        elif name.endswith(".py"):
            found.add(f"{parent}/{name}" if parent else name)
    return found


def test_layout_lists_every_module_once_and_nothing_else():
    modules = {p.relative_to(ROOT).as_posix() for p in (ROOT / "thickbake").rglob("*.py")
               if "__pycache__" not in p.parts}
    # a sub-package's __init__.py needs no line of its own when it is empty: its folder line says it all
    modules = {m for m in modules if not (m.endswith("/__init__.py") and m.count("/") > 1
                                         and not (ROOT / m).read_text(encoding="utf-8").strip())}
    listed = {e for e in layout_entries() if e.startswith("thickbake/")}
    assert not modules - listed, f"modules without a line in README's Layout: {sorted(modules - listed)}"
    assert not listed - modules, f"README's Layout lists modules that do not exist: {sorted(listed - modules)}"
    scripts = {p.relative_to(ROOT).as_posix() for p in (ROOT / "scripts").glob("*.py")}
    assert scripts <= layout_entries(), f"scripts without a line in README's Layout: {sorted(scripts - layout_entries())}"


@pytest.mark.parametrize("command", ["bake", "shapes", "verify", "compare", "batch", "preview"])
def test_every_option_is_documented(command, capsys):
    with pytest.raises(SystemExit) as done:
        main([command, "--help"])
    assert done.value.code == 0
    # option names at the start of a help entry ("  -o OUT, --output OUT", "  --size N|WxH"), not "exp(-d/L)"
    entries = re.findall(r"^  (-[^ ].*?)(?:  |$)", capsys.readouterr().out, flags=re.M)
    options = {word.rstrip(",") for entry in entries for word in entry.split() if word.startswith("-")}
    options -= {"-h", "--help"}
    missing = sorted(o for o in options if not re.search(rf"`[^`]*(?<![\w-]){re.escape(o)}(?![\w-])[^`]*`", README))
    assert not missing, f"options of 'thickbake {command}' missing from README: {missing}"
