"""The package's floors: imports only go down, no circles, no hidden imports, no fallbacks.

The layout is described in DEVELOPERS.md. This test reads the package's own files with ``ast``
(nothing is imported), so it also catches imports that only run inside a function.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "selector"

#: Floors from the ground up; a module may import its own floor or lower ones.
FLOORS = {"errors": 0, "core": 1, "settings": 2, "store": 3, "jobs": 4, "present": 5, "demo": 6, "api": 7, "cli": 8}


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path
    return out


def _floor(module: str) -> int | None:
    parts = module.split(".")
    if len(parts) == 1:
        return None  # the package root: only its version is imported from it
    return FLOORS[parts[1]]


def _resolve(module: str, node: ast.ImportFrom, is_package: bool) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(module: str, path: Path):
    """(imported module, line, inside a function?, names) for every import of the package's own modules."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    is_package = path.name == "__init__.py"
    found = []

    def visit(node, in_function):
        for child in ast.iter_child_nodes(node):
            inner = in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            if isinstance(child, ast.Import):
                for alias in child.names:
                    if alias.name.split(".")[0] == "selector":
                        found.append((alias.name, child.lineno, in_function, ()))
            elif isinstance(child, ast.ImportFrom):
                target = _resolve(module, child, is_package)
                if target.split(".")[0] == "selector":
                    names = tuple(a.name for a in child.names)
                    if target == "selector":
                        # `from selector import core` names a subpackage; `__version__` is the root's own
                        for n in names:
                            found.append((target if n.startswith("__") else f"selector.{n}", child.lineno,
                                          in_function, (n,)))
                    else:
                        found.append((target, child.lineno, in_function, names))
            visit(child, inner)

    visit(tree, False)
    return found


MODULES = _modules()
IMPORTS = {m: _imports(m, p) for m, p in MODULES.items()}


def test_every_module_has_a_floor():
    for module in MODULES:
        if module != "selector":
            assert module.split(".")[1] in FLOORS, f"{module}: not on any floor; add it to FLOORS and DEVELOPERS.md"


@pytest.mark.parametrize("module", sorted(m for m in MODULES if m != "selector"))
def test_imports_only_go_down(module):
    here = _floor(module)
    for target, line, _, _ in IMPORTS[module]:
        there = _floor(target)
        if there is None:
            continue
        assert there <= here, (f"{MODULES[module].name}:{line} imports {target} (floor {there}) from floor {here}: "
                               "imports only go down")


def test_no_package_imports_inside_functions_except_the_command_line():
    inside = [f"{module}:{line} imports {target}" for module, imports in IMPORTS.items()
              if module != "selector.cli"  # a command's module is imported when it runs: start-up stays quick
              for target, line, in_function, _ in imports if in_function]
    assert not inside, "imports inside functions: " + "; ".join(inside)


def test_no_circles_between_modules():
    graph = {m: set() for m in MODULES}
    for module, imports in IMPORTS.items():
        for target, _, _, names in imports:
            for candidate in [f"{target}.{n}" for n in names] + [target]:
                if candidate in MODULES and candidate != module:
                    graph[module].add(candidate)
                    break
    state: dict[str, int] = {}

    def walk(node, stack):
        state[node] = 1
        for nxt in sorted(graph[node]):
            if nxt == "selector" or nxt.count(".") == 1 and MODULES[nxt].name == "__init__.py" and node.startswith(nxt):
                continue  # a subpackage's face importing its members, imported back by them, is not a loop
            if state.get(nxt) == 1:
                raise AssertionError("import circle: " + " -> ".join(stack[stack.index(nxt):] + [nxt]))
            if nxt not in state:
                walk(nxt, stack + [nxt])
        state[node] = 2

    for m in sorted(graph):
        if m not in state:
            walk(m, [m])


def test_no_import_error_fallbacks():
    for module, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Try):
                imports_package = any(isinstance(n, (ast.Import, ast.ImportFrom)) and
                                      "selector" in ast.unparse(n) for b in node.body for n in ast.walk(b))
                catches = " ".join(ast.unparse(h.type) for h in node.handlers if h.type is not None)
                assert not (imports_package and "ImportError" in catches), (
                    f"{path.name}:{node.lineno}: an ImportError fallback around the package's own code")


def test_the_checks_can_fail(tmp_path):
    # a module on the core floor that imports a job must be reported
    fake = tmp_path / "selector" / "core" / "bad.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("from selector.jobs.tune import tune\n\ndef f():\n    from selector.store import io\n")
    found = _imports("selector.core.bad", fake)
    assert [(t, inside) for t, _, inside, _ in found] == [("selector.jobs.tune", False), ("selector.store", True)]
    assert _floor("selector.jobs.tune") > _floor("selector.core.bad")


def test_no_function_takes_more_than_five_positional_parameters():
    too_many = []
    for module, path in MODULES.items():
        if module.startswith("selector.demo"):
            continue  # the simulator's private helpers are not an interface between modules
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                positional = [a.arg for a in node.args.posonlyargs + node.args.args if a.arg not in ("self", "cls")]
                if len(positional) > 5:
                    too_many.append(f"{module}:{node.lineno} {node.name}() ({len(positional)})")
    assert not too_many, "more than five positional parameters (make the rest keyword-only): " + "; ".join(too_many)
