"""The package's layers, read from the source with ``ast`` (no module is imported).

Imports point down only: the root modules (errors, settings, version, geometry, constants, ...) sit at
the bottom, then ``maps``, ``pipeline``, ``checks``, ``preview``, ``batch`` and ``cli`` on top.  A module may import
from its own layer or a lower one; inside a sub-package any direction is fine as long as nothing forms
a cycle.  Imports inside functions count as much as those at the top of a module.  The public facade
(``thickbake/__init__.py``) and ``__main__.py`` are the top and may import anything.  Only ``cli/``
prints, parses arguments or exits.

The modules are found by walking the package folder, so a module added later is checked without
editing this file; a new sub-package has to be given its layer in ``LAYERS`` (the test says so).
That these tests can fail is shown by ``scripts/mutation_checks.py``, which adds an upward import
inside a function, a print in a library module and a cycle within a sub-package to a copy of the
package and expects this file to go red.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass, field
from pathlib import Path

PACKAGE = "thickbake"
ROOT = Path(__file__).resolve().parent.parent / PACKAGE

#: Layer of each sub-package; modules directly under thickbake/ are layer 0.
LAYERS = {"maps": 1, "pipeline": 2, "checks": 3, "preview": 4, "batch": 5, "cli": 6}
#: The top: may import anything, and may print or exit.
FACADE = {PACKAGE, f"{PACKAGE}.__main__"}
#: Modules that may print, parse arguments or exit (and the facade).
UI_PACKAGE = f"{PACKAGE}.cli"


@dataclass
class Module:
    name: str
    path: Path
    is_package: bool
    imports: list = field(default_factory=list)        # (line, resolved module name, as written)
    ui_calls: list = field(default_factory=list)       # (line, what)


def module_name(path: Path) -> tuple[str, bool]:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        return ".".join(parts[:-1]), True
    return ".".join(parts), False


def discover() -> dict[str, Module]:
    modules = {}
    for path in sorted(ROOT.rglob("*.py")):
        if "__pycache__" in path.parts:
            continue
        name, is_package = module_name(path)
        modules[name] = Module(name, path, is_package)
    return modules


MODULES = discover()


def resolve(name: str) -> str | None:
    """The longest prefix of a dotted name that is a module of the package (None: not ours)."""
    parts = name.split(".")
    if parts[0] != PACKAGE:
        return None
    while parts:
        candidate = ".".join(parts)
        if candidate in MODULES:
            return candidate
        parts.pop()
    return None


def _base_of_relative(module: Module, level: int, target: str | None) -> str:
    package = module.name.split(".") if module.is_package else module.name.split(".")[:-1]
    if level > 1:
        package = package[: len(package) - (level - 1)]
    return ".".join(package + ([target] if target else []))


class _Scanner(ast.NodeVisitor):
    def __init__(self, module: Module):
        self.module = module

    def _add(self, line: int, written: str, candidates: list[str]) -> None:
        for candidate in candidates:
            target = resolve(candidate)
            if target is not None:
                self.module.imports.append((line, target, written))

    def visit_Import(self, node: ast.Import) -> None:
        for alias in node.names:
            self._add(node.lineno, alias.name, [alias.name])
            if alias.name.split(".")[0] == "argparse":
                self.module.ui_calls.append((node.lineno, "import argparse"))

    def visit_ImportFrom(self, node: ast.ImportFrom) -> None:
        if node.level:
            base = _base_of_relative(self.module, node.level, node.module)
            written = "." * node.level + (node.module or "")
        else:
            base, written = node.module or "", node.module or ""
        # `from a.b import c` imports module a.b.c when it exists, else the name c of module a.b
        self._add(node.lineno, written, [f"{base}.{alias.name}" if f"{base}.{alias.name}" in MODULES else base
                                         for alias in node.names])
        if base.split(".")[0] == "argparse":
            self.module.ui_calls.append((node.lineno, "from argparse import"))
        if base == "sys" and any(a.name == "exit" for a in node.names):
            self.module.ui_calls.append((node.lineno, "from sys import exit"))

    def visit_Call(self, node: ast.Call) -> None:
        func = node.func
        if isinstance(func, ast.Name) and func.id in ("print", "exit", "quit", "SystemExit"):
            self.module.ui_calls.append((node.lineno, f"{func.id}("))
        elif isinstance(func, ast.Attribute) and func.attr == "exit" and isinstance(func.value, ast.Name) \
                and func.value.id == "sys":
            self.module.ui_calls.append((node.lineno, "sys.exit("))
        elif isinstance(func, ast.Attribute) and func.attr == "import_module" or \
                isinstance(func, ast.Name) and func.id in ("import_module", "__import__"):
            # importlib.import_module("thickbake.x"): a dynamic import with a literal name still counts
            if node.args and isinstance(node.args[0], ast.Constant) and isinstance(node.args[0].value, str):
                self._add(node.lineno, node.args[0].value, [node.args[0].value])
        self.generic_visit(node)

    def visit_Raise(self, node: ast.Raise) -> None:
        exc = node.exc
        name = exc.func if isinstance(exc, ast.Call) else exc
        if isinstance(name, ast.Name) and name.id == "SystemExit":
            self.module.ui_calls.append((node.lineno, "raise SystemExit"))
        self.generic_visit(node)


for _module in MODULES.values():
    _Scanner(_module).visit(ast.parse(_module.path.read_text(encoding="utf-8"), filename=str(_module.path)))


def layer_of(name: str) -> tuple[int, str]:
    """(layer, sub-package) of a module; root modules are (0, "")."""
    parts = name.split(".")
    if len(parts) == 2 and not MODULES[name].is_package:
        return 0, ""
    sub = parts[1]
    if sub not in LAYERS:
        raise KeyError(sub)
    return LAYERS[sub], sub


def where(module: Module, line: int) -> str:
    return f"{module.path.relative_to(ROOT.parent)}:{line}"


# ---------------------------------------------------------------------------- the tests
def test_the_scan_sees_the_package():
    # guards the scanner itself: the facade imports the pipeline lazily (inside a function), the
    # command line imports its commands, and the CLI's own print calls are found
    assert {"thickbake.errors", "thickbake.settings", "thickbake.cli.main", "thickbake.pipeline.driver"} <= set(MODULES)
    assert "thickbake.pipeline.driver" in {t for _, t, _ in MODULES[PACKAGE].imports}
    assert any(t.startswith("thickbake.cli.") for _, t, _ in MODULES["thickbake.cli.main"].imports)
    assert MODULES["thickbake.cli.output"].ui_calls


def test_every_sub_package_has_a_layer():
    unknown = sorted({n.split(".")[1] for n in MODULES
                      if n not in FACADE and (n.count(".") > 1 or MODULES[n].is_package)} - set(LAYERS))
    assert not unknown, f"new sub-package(s) {unknown}: give each its layer in LAYERS of {Path(__file__).name}"


def test_imports_point_down():
    wrong = []
    for module in MODULES.values():
        if module.name in FACADE:
            continue
        own_layer, own_sub = layer_of(module.name)
        for line, target, written in module.imports:
            if target in FACADE:
                wrong.append(f"{where(module, line)} imports the public facade ({written}); import the module "
                             "that defines the name instead")
                continue
            layer, sub = layer_of(target)
            if layer > own_layer:
                wrong.append(f"{where(module, line)}: {module.name} (layer {own_layer}, {own_sub or 'root'}) imports "
                             f"{target} (layer {layer}, {sub}) - imports must point down")
    assert not wrong, "\n".join(wrong)


def test_only_the_command_line_prints_parses_arguments_or_exits():
    wrong = [f"{where(m, line)}: {what}" for m in MODULES.values()
             if m.name not in FACADE and not (m.name == UI_PACKAGE or m.name.startswith(UI_PACKAGE + "."))
             for line, what in m.ui_calls]
    assert not wrong, "only thickbake/cli/ may print, use argparse or exit:\n" + "\n".join(wrong)


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of a directed graph as a list of nodes (first == last), or None (iterative DFS)."""
    WHITE, GREY, BLACK = 0, 1, 2
    colour = dict.fromkeys(graph, WHITE)
    for start in sorted(graph):
        if colour[start] != WHITE:
            continue
        stack = [(start, iter(sorted(graph[start])))]
        path = [start]
        colour[start] = GREY
        while stack:
            node, children = stack[-1]
            child = next(children, None)
            if child is None:
                colour[node] = BLACK
                stack.pop()
                path.pop()
            elif colour.get(child, BLACK) == GREY:
                return path[path.index(child):] + [child]
            elif colour.get(child) == WHITE:
                colour[child] = GREY
                stack.append((child, iter(sorted(graph[child]))))
                path.append(child)
    return None


def test_no_import_cycles():
    # the facade re-exports and is imported by no module (checked above), so it is left out
    graph = {name: {t for _, t, _ in m.imports if t != name and t not in FACADE}
             for name, m in MODULES.items() if name not in FACADE}
    cycle = find_cycle(graph)
    assert cycle is None, "import cycle: " + " -> ".join(cycle)
