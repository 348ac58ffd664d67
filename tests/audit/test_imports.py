"""The audit shares no code with the builder: no import, direct or transitive, of its modules."""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
FORBIDDEN = ("goalkit.relabel", "goalkit.reward", "goalkit.pipeline.chunk", "goalkit.write.rules",
             "goalkit.pipeline.headcols", "goalkit.pipeline.labels", "goalkit.heads")


def _module_file(name: str) -> Path | None:
    p = ROOT.joinpath(*name.split("."))
    if (p / "__init__.py").is_file():
        return p / "__init__.py"
    if p.with_suffix(".py").is_file():
        return p.with_suffix(".py")
    return None


def goalkit_imports(name: str) -> set[str]:
    """Modules of goalkit that module ``name`` imports anywhere (top level or inside functions)."""
    f = _module_file(name)
    if f is None:
        return set()
    package = name if f.name == "__init__.py" else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(f.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module
            found.add(mod)
            found |= {f"{mod}.{a.name}" for a in node.names}  # "from pkg import module"
    out = set()
    for mod in found:
        parts = mod.split(".")
        if parts[0] != "goalkit":
            continue
        for i in range(1, len(parts) + 1):  # a module imports its parent packages too
            prefix = ".".join(parts[:i])
            if _module_file(prefix):
                out.add(prefix)
    return out


def closure(start) -> set[str]:
    seen, todo = set(), list(start)
    while todo:
        m = todo.pop()
        if m not in seen:
            seen.add(m)
            todo.extend(goalkit_imports(m))
    return seen


def _bad(modules):
    return sorted(m for m in modules if m == "goalkit.reward" or m.startswith(FORBIDDEN))


def test_audit_imports_nothing_of_the_builder():
    audit = [f"goalkit.audit.{p.stem}" if p.stem != "__init__" else "goalkit.audit"
             for p in (ROOT / "goalkit" / "audit").glob("*.py")]
    assert len(audit) >= 6
    reached = closure(audit)
    assert "goalkit.logs" in reached and "goalkit.goals.goalmap" in reached  # the walk does follow imports
    assert _bad(reached) == []


def test_the_walk_finds_a_forbidden_import():
    # the checker itself: verify's module reaches the builder (through function-level imports)
    assert "goalkit.pipeline.chunk" in _bad(closure(["goalkit.write.verify"]))
    assert "goalkit.relabel" in _bad(closure(["goalkit.write.reader"]))
