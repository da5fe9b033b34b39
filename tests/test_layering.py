"""Imports point down (DEVELOPERS.md, "Modules and layering"), function-local ones included.

The layer list in DEVELOPERS.md is the contract: every module of labrun/ is on one of its lines,
and a module imports only from its own line or the lines below it. Imports inside functions
count (a lazy import is still a dependency); imports under ``if TYPE_CHECKING:`` (annotations
only, never executed) do not. Two modules that import each other, even on one line, are a
cycle and refused as well: one of them must be the lower one.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "labrun"


def layers(text: str) -> dict[str, int]:
    """Module pattern (``engine``, ``instruments.*``) -> level (0 = top) from the guide's list."""
    block = text.split("## Modules and layering", 1)[1].split("```", 2)[1]
    found: dict[str, int] = {}
    for line in block.splitlines():
        if not line.strip():
            continue
        level = (len(line) - len(line.lstrip())) // 2
        body = re.sub(r"\([^)]*\)", "", line).strip()
        if body.startswith("labrun.cli.*"):
            body = "cli.*"
        for name in body.split(","):
            if name.strip():
                found[name.strip()] = level
    return found


def module_name(path: Path) -> str:
    """``labrun.engine`` of labrun/engine.py, ``labrun.store`` of labrun/store/__init__.py."""
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def level_of(module: str, table: dict[str, int]) -> int | None:
    """The level of ``labrun.x.y`` in ``table`` (a ``x.*`` pattern covers x and its modules)."""
    name = module.removeprefix("labrun.")
    if name in table:
        return table[name]
    head = name.split(".")[0]
    return table.get(f"{head}.*")


def _type_checking_only(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def imports(source: str, module: str) -> list[tuple[int, str]]:
    """(line, imported labrun module) for every executed import of ``source``."""
    out: list[tuple[int, str]] = []
    package = module if module.count(".") == 0 else module.rsplit(".", 1)[0]

    def visit(node: ast.AST) -> None:
        if isinstance(node, ast.If) and _type_checking_only(node):
            for child in node.orelse:
                visit(child)
            return
        if isinstance(node, ast.Import):
            out.extend((node.lineno, a.name) for a in node.names if a.name.startswith("labrun"))
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parent = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                base = f"{parent}.{base}" if base else parent
            if base.startswith("labrun"):
                for alias in node.names:
                    sub = f"{base}.{alias.name}"
                    out.append((node.lineno, sub if _exists(sub) else base))
        for child in ast.iter_child_nodes(node):
            visit(child)

    visit(ast.parse(source))
    return out


def _exists(module: str) -> bool:
    """True when ``module`` is a module file or package of the repository."""
    path = ROOT.joinpath(*module.split("."))
    return path.with_suffix(".py").exists() or (path / "__init__.py").exists()


def graph() -> dict[str, list[tuple[int, str]]]:
    """Every labrun module -> its executed imports of labrun modules."""
    return {module_name(p): imports(p.read_text(encoding="utf-8"), module_name(p))
            for p in sorted(PACKAGE.rglob("*.py"))}


def upward(edges: dict[str, list[tuple[int, str]]], table: dict[str, int]) -> list[str]:
    """Imports that point up the list, and modules the list does not name."""
    problems = []
    for module, found in edges.items():
        if module in ("labrun", "labrun.__main__"):  # the package and ``python -m labrun``
            continue
        mine = level_of(module, table)
        if mine is None:
            problems.append(f"{module}: not in DEVELOPERS.md's layer list")
            continue
        for line, target in found:
            theirs = level_of(target, table)
            if target != "labrun" and theirs is not None and theirs < mine:
                problems.append(f"{module}:{line} imports {target} (a higher layer)")
    return problems


def cycles(edges: dict[str, list[tuple[int, str]]]) -> list[str]:
    """Pairs of modules that import each other, directly or through others (a package and its
    own modules aside: ``labrun.store`` re-exports what ``labrun.store.db`` defines)."""

    def related(a: str, b: str) -> bool:
        return a.startswith(b + ".") or b.startswith(a + ".") or "labrun" in (a, b)

    reach: dict[str, set[str]] = {}
    for start in edges:
        seen, todo = set(), [start]
        while todo:
            for _, target in edges.get(todo.pop(), []):
                if target not in seen and not related(start, target):
                    seen.add(target)
                    todo.append(target)
        reach[start] = seen
    return sorted({" <-> ".join(sorted((a, b))) for a in edges for b in reach[a]
                   if a in reach.get(b, set()) and a != b})


def test_every_import_points_down():
    table = layers((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"))
    problems = upward(graph(), table)
    assert not problems, "\n".join(problems)


def test_no_import_cycles():
    found = cycles(graph())
    assert not found, "modules importing each other:\n" + "\n".join(found)


def test_the_checks_can_fail():
    """A function-local upward import and a cycle are reported; one under TYPE_CHECKING is not."""
    table = {"engine": 1, "rehearse": 0, "plan": 2}
    local = "def f():\n    from labrun.rehearse import rehearse\n"
    assert upward({"labrun.engine": imports(local, "labrun.engine")}, table)
    typed = "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    import labrun.rehearse\n"
    assert not upward({"labrun.engine": imports(typed, "labrun.engine")}, table)
    assert cycles({"labrun.fits": [(1, "labrun.exactfit")],
                   "labrun.exactfit": [(1, "labrun.fits")]})
