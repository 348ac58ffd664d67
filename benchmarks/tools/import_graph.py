"""Count goalkit's function-local imports of its own modules, and its import cycles.

    python benchmarks/tools/import_graph.py [--list] [ROOT]

Reads every ``goalkit/**/*.py`` with :mod:`ast` (nothing is imported). An import of a goalkit
module is *function-local* when it sits inside a function body (``def`` / ``async def``, at any
depth); *module-level* otherwise. ``if TYPE_CHECKING:`` blocks are skipped: they never run.
Cycles are strongly connected components (Tarjan 1972) of more than one module in the graph of
module-level imports (``from goalkit.a import b`` points at ``goalkit.a.b`` when that is a
module, else at ``goalkit.a``); the implicit import of a parent package is not an edge. The
cycles that function-local imports hide (they are there, only deferred to call time) are
counted too, in the graph of all imports. Counts are per import statement.
"""

from __future__ import annotations

import ast
import json
import sys
from pathlib import Path


def module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _is_type_checking(node: ast.If) -> bool:
    t = node.test
    return (isinstance(t, ast.Name) and t.id == "TYPE_CHECKING") or (
        isinstance(t, ast.Attribute) and t.attr == "TYPE_CHECKING")


def imports_of(tree: ast.AST, this: str, modules: set[str]):
    """Yield (target modules, line, function-local?) for each import statement of goalkit modules."""

    def targets(node):
        if isinstance(node, ast.Import):
            return [a.name for a in node.names]
        base = node.module or ""
        if node.level:  # relative import
            pkg = this.split(".")
            pkg = pkg[: len(pkg) - node.level + (1 if this in packages else 0)]
            base = ".".join(pkg + ([base] if base else []))
        out = []
        for a in node.names:
            sub = f"{base}.{a.name}"
            out.append(sub if sub in modules else base)
        return out

    def walk(node, in_function):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and _is_type_checking(child):
                for c in child.orelse:
                    yield from walk(ast.Module(body=[c], type_ignores=[]), in_function)
                continue
            local = in_function or isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                own = sorted({t for t in targets(child) if t == "goalkit" or t.startswith("goalkit.")})
                if own:
                    yield own, child.lineno, in_function
            yield from walk(child, local)

    packages = {m for m in modules if (m + ".__init__") in modules_with_init}
    yield from walk(tree, False)


modules_with_init: set[str] = set()


def analyse(root: Path) -> dict:
    """The counts for the package ``goalkit`` under ``root``."""
    files = sorted((root / "goalkit").rglob("*.py"))
    modules = {module_name(p, root): p for p in files}
    modules_with_init.clear()
    modules_with_init.update(module_name(p, root) + ".__init__" for p in files if p.name == "__init__.py")
    local, edges, all_edges = [], {m: set() for m in modules}, {m: set() for m in modules}
    for name, path in modules.items():
        tree = ast.parse(path.read_text(), filename=str(path))
        for found, line, in_function in imports_of(tree, name, set(modules)):
            if in_function:
                local.append({"file": str(path.relative_to(root)), "line": line, "imports": found})
            for target in found:
                if target in modules and target != name:
                    all_edges[name].add(target)
                    if not in_function:
                        edges[name].add(target)
    cycles = strongly_connected(edges)
    deferred = strongly_connected(all_edges)
    return {"function_local_imports": len(local), "import_cycles": len(cycles),
            "cycles": [sorted(c) for c in cycles],
            "cycles_counting_function_local_imports": len(deferred),
            "deferred_cycles": [sorted(c) for c in deferred], "local": local}


def strongly_connected(edges: dict[str, set[str]]) -> list[set[str]]:
    """Components of more than one node (Tarjan's algorithm, iterative)."""
    index, low, on, stack, out, counter = {}, {}, set(), [], [], [0]
    for start in sorted(edges):
        if start in index:
            continue
        work = [(start, iter(sorted(edges[start])))]
        index[start] = low[start] = counter[0]; counter[0] += 1
        stack.append(start); on.add(start)
        while work:
            v, it = work[-1]
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter[0]; counter[0] += 1
                    stack.append(w); on.add(w)
                    work.append((w, iter(sorted(edges.get(w, ())))))
                    break
                if w in on:
                    low[v] = min(low[v], index[w])
            else:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = set()
                    while True:
                        w = stack.pop(); on.discard(w); comp.add(w)
                        if w == v:
                            break
                    if len(comp) > 1:
                        out.append(comp)
    return out


def main(argv: list[str]) -> int:
    show = "--list" in argv
    args = [a for a in argv if a != "--list"]
    root = Path(args[0]) if args else Path(__file__).resolve().parents[2]
    res = analyse(root)
    if show:
        for item in res["local"]:
            print(f"{item['file']}:{item['line']}: {', '.join(item['imports'])}")
    print(json.dumps({k: v for k, v in res.items() if k != "local"}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
