"""The build engine's modules import one way: no cycles among goalkit's modules, no producer imports the engine."""

import ast
from pathlib import Path

import goalkit

PKG = Path(goalkit.__file__).parent


def _imports():
    """Module name -> goalkit modules it imports (module level and inside functions), by ast."""
    mods = {}
    for f in PKG.rglob("*.py"):
        parts = f.relative_to(PKG.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        mods[name] = f

    def owner(dotted):
        while dotted and dotted not in mods:
            dotted = dotted.rpartition(".")[0]
        return dotted

    edges = {}
    for name, f in mods.items():
        out = set()
        for node in ast.walk(ast.parse(f.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and node.level == 0 and (node.module or "").startswith("goalkit"):
                for alias in node.names:
                    out.add(owner(f"{node.module}.{alias.name}"))
            elif isinstance(node, ast.Import):
                out |= {owner(a.name) for a in node.names if a.name.startswith("goalkit")}
        # a package's own __init__ is imported with any of its modules: not an edge back
        edges[name] = {t for t in out if t and t != name and not name.startswith(t + ".")}
    return edges


def _cycles(edges):
    """Strongly connected groups of more than one module (Tarjan, 1972)."""
    index, low, stack, on, groups, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in edges.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                on.discard(w)
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                groups.append(sorted(group))

    for v in list(edges):
        if v not in index:
            visit(v)
    return groups


def test_no_import_cycles_among_goalkit_modules():
    assert _cycles(_imports()) == []


def test_the_cycle_finder_finds_a_planted_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


def test_producers_and_runners_do_not_import_the_engine():
    edges = _imports()
    engine = "goalkit.pipeline.build"
    for name in ("inprocess", "sharded", "workers", "dask_build", "buildfolder", "shardfiles", "chunk"):
        assert engine not in edges[f"goalkit.pipeline.{name}"], name
    assert {"goalkit.pipeline.inprocess", "goalkit.pipeline.sharded"} <= edges[engine]
