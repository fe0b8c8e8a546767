"""The layout rule, checked on the source: imports point only downward.

Layers, lowest first (DEVELOPERS.md, "Layout"). A module may import from its own
package and from packages of lower layers; never from a higher layer, never from
another package of its own layer. No circle of imports between modules (imports
inside functions count too: a lazy import still ties the two modules together),
and no private name (``_name``) imported from another module.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1] / "ocrbench"

LAYERS: list[list[str]] = [
    ["__init__", "errors", "intervals"],
    ["io"],
    ["pages"],                      # page images -> line crops; recognisers cut crops with pages.segment
    ["recognisers", "store", "synth"],
    ["ledger"],
    ["accuracy"],
    ["postprocess"],
    ["run"],
    ["planning", "quality"],
    ["report"],
    ["demo"],
    ["cli"],
    ["__main__"],
]
RANK = {pkg: i for i, layer in enumerate(LAYERS) for pkg in layer}


def module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def top_package(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def all_modules() -> dict[str, Path]:
    return {module_name(p): p for p in sorted(ROOT.rglob("*.py"))}


def imports_of(path: Path, modules: dict[str, Path]) -> list[tuple[str, list[str], int]]:
    """(imported module, names imported from it, line) for every ocrbench import."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    me = module_name(path)
    package = me if path.name == "__init__.py" else me.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                if a.name == "ocrbench" or a.name.startswith("ocrbench."):
                    found.append((a.name, [], node.lineno))
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if not (target == "ocrbench" or target.startswith("ocrbench.")):
                continue
            names = [a.name for a in node.names]
            # ``from ocrbench.x import y`` where y is itself a module: count y.
            sub = [n for n in names if f"{target}.{n}" in modules]
            for n in sub:
                found.append((f"{target}.{n}", [], node.lineno))
            rest = [n for n in names if n not in sub]
            if rest or not sub:
                found.append((target, rest, node.lineno))
    return found


def import_graph() -> dict[str, list[tuple[str, list[str], int]]]:
    modules = all_modules()
    return {m: imports_of(p, modules) for m, p in modules.items()}


def test_every_package_has_a_layer() -> None:
    packages = {top_package(m) for m in all_modules()}
    assert packages <= set(RANK), f"packages without a layer: {sorted(packages - set(RANK))}"


def test_imports_point_only_downward() -> None:
    bad = []
    for mod, imps in import_graph().items():
        mine = top_package(mod)
        for target, _names, line in imps:
            theirs = top_package(target)
            if theirs == mine or theirs == "__init__":
                continue
            if RANK[theirs] >= RANK[mine]:
                bad.append(f"{mod}:{line} imports {target} ({theirs}, layer {RANK[theirs]} >= {RANK[mine]})")
    assert not bad, "upward or sideways imports:\n" + "\n".join(bad)


def test_no_private_name_imported_across_modules() -> None:
    bad = []
    for mod, imps in import_graph().items():
        for target, names, line in imps:
            for n in names:
                if n.startswith("_") and not n.startswith("__"):
                    bad.append(f"{mod}:{line} imports private {target}.{n}")
    assert not bad, "\n".join(bad)


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    colour: dict[str, int] = {}
    stack: list[str] = []

    def visit(n: str) -> list[str] | None:
        colour[n] = 1
        stack.append(n)
        for m in sorted(graph.get(n, ())):
            if colour.get(m) == 1:
                return stack[stack.index(m):] + [m]
            if colour.get(m) is None:
                found = visit(m)
                if found:
                    return found
        stack.pop()
        colour[n] = 2
        return None

    for n in sorted(graph):
        if colour.get(n) is None:
            found = visit(n)
            if found:
                return found
    return None


def test_no_import_circle() -> None:
    modules = all_modules()
    graph: dict[str, set[str]] = {}
    for mod, imps in import_graph().items():
        edges = set()
        for target, _names, _line in imps:
            # a package's __init__ is imported whenever one of its modules is; count
            # the edge to the module itself, and to the package only when named.
            if target in modules and target != mod:
                edges.add(target)
        graph[mod] = edges
    cycle = find_cycle(graph)
    assert cycle is None, "import circle: " + " -> ".join(cycle or [])


def test_the_checker_sees_a_circle_and_an_upward_import() -> None:
    # The rule's own check on a made-up graph, so a checker that finds nothing fails here.
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None
    assert RANK["store"] < RANK["run"] < RANK["report"] < RANK["cli"]


MAX_FUNCTION_LINES = 80


def long_functions() -> list[str]:
    """Functions over MAX_FUNCTION_LINES lines whose body carries no comment saying why (a comment
    that mentions "80 lines")."""
    out = []
    for mod, path in all_modules().items():
        src = path.read_text(encoding="utf-8")
        lines = src.splitlines()
        for node in ast.walk(ast.parse(src)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = node.end_lineno - node.lineno + 1
                body = lines[node.lineno - 1:node.end_lineno]
                if n > MAX_FUNCTION_LINES and not any("#" in ln and "80 lines" in ln for ln in body):
                    out.append(f"{mod}.{node.name}: {n} lines")
    return out


def test_no_function_over_80_lines_without_a_reason() -> None:
    bad = long_functions()
    assert not bad, "functions over 80 lines with no comment saying why:\n" + "\n".join(bad)
