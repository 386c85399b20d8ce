"""The package layout is the data flow: no module-level import cycle, imports point one way.

Sub-packages in pipeline order; a module may import, at module level, only from its own
sub-package, from earlier ones and from the root helpers (errors, version). Imports inside
functions are deliberate lazy loads and are not counted (they keep start-up cheap).
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "errbudget"
ORDER = (
    "laws", "solve", "case", "uncertainty", "estimates", "budget", "outputs", "report", "batch",
)  # fmt: skip
ROOT_HELPERS = ("errors", "version")


def _modules() -> dict[str, Path]:
    found = {}
    for path in PACKAGE.rglob("*.py"):
        parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        found[".".join(parts)] = path
    return found


def _module_level_imports(name: str, path: Path, modules: dict[str, Path]) -> set[str]:
    """Modules of the package imported at module level (also inside if/try at top level)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    nodes = []
    for node in tree.body:
        nodes += list(ast.walk(node)) if isinstance(node, ast.If | ast.Try) else [node]
    found = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            targets = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parts = name.split(".")
                parts = parts if path.name == "__init__.py" else parts[:-1]
                parts = parts[: len(parts) - node.level + 1]
                base = ".".join(parts + ([base] if base else []))
            targets = [
                f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names
            ]
        else:
            continue
        found.update(t for t in targets if t in modules and t != name)
    return found


def _graph() -> dict[str, set[str]]:
    modules = _modules()
    return {name: _module_level_imports(name, path, modules) for name, path in modules.items()}


def _cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a list of modules, or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for target in sorted(graph[node]):
            if state.get(target) == 1:
                return stack[stack.index(target) :] + [target]
            if target not in state and (found := visit(target)):
                return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state and (found := visit(node)):
            return found
    return None


def _layer(module: str) -> int | None:
    """Position of a module's sub-package in ORDER; None for the root modules."""
    parts = module.split(".")
    return ORDER.index(parts[1]) if len(parts) > 1 and parts[1] in ORDER else None


def test_no_module_level_import_cycle():
    cycle = _cycle(_graph())
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


def test_imports_point_one_way_down_the_pipeline():
    wrong = []
    for module, targets in _graph().items():
        mine = _layer(module)
        for target in targets:
            theirs = _layer(target)
            if theirs is None:
                root_helper = target.split(".")[-1] in ROOT_HELPERS or target == "errbudget"
                if not root_helper and mine is not None:
                    wrong.append(f"{module} -> {target} (a root module)")
                continue
            if mine is not None and theirs > mine:
                wrong.append(f"{module} -> {target}")
    assert not wrong, "imports against the pipeline order:\n" + "\n".join(sorted(wrong))


def test_the_cycle_finder_finds_a_cycle():
    assert _cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _cycle({"a": {"b"}, "b": set()}) is None
