"""No test replaces an attribute of a module (or of a class or function it imports) or touches a
private member of another object (issue 14: explicit seams instead of monkeypatching and
reaching in).

A test that swaps ``labrun.engine.something`` or ``labrun.cli.build_parser`` for the duration of a
test couples to the module's private wiring and breaks silently when an import moves; labrun's
collaborators are parameters instead (``engine.Seams``, ``cli.main(overrides=...)``, a store or
bench passed in). This scan reads every Python file under tests/ (support modules and conftest
too) and reports, with file and line:

- ``monkeypatch.setattr``/``delattr`` (or builtin ``setattr``/``delattr``) whose target is a
  dotted-path string or an expression rooted at an imported name (a module, a class such as
  ``Store`` or ``ScpiSession``: patching a class changes it for every instance);
- an assignment or ``del`` of an attribute of an imported name (``scpi.resource_manager = f``);
- any use of ``unittest.mock.patch`` (``patch``, ``patch.object``, ``mock.patch``).

Environment variables (``monkeypatch.setenv``) and attributes of objects a test made itself
(a store, an adapter, a session) are not reported. A second scan reports ``x._name`` for any
``x`` but ``self``/``cls`` (underscore names that a library documents as public aside): a test
uses the public seam the object offers (``ScpiSession.set_timeout``,
``ScpiSession.visa_resource``, the virtual lab's ``ascii_cut``). A third scan reads labrun/
itself: no module uses another module's private names (imported, or as an attribute it does
not define itself); what crosses a module boundary is public and documented.
"""

from __future__ import annotations

import ast
import textwrap
from pathlib import Path

TESTS = Path(__file__).resolve().parent


def _imported_names(nodes: list[ast.AST]) -> set[str]:
    """Local names that an import statement among ``nodes`` binds (modules, classes, functions:
    replacing an attribute of any of them changes it for every other user)."""
    names: set[str] = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            names |= {alias.asname or alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom):
            names |= {alias.asname or alias.name for alias in node.names}
    return names


def _root(node: ast.AST) -> str | None:
    """The name an attribute chain starts from (``a`` of ``a.b.c``), if any."""
    while isinstance(node, ast.Attribute):
        node = node.value
    return node.id if isinstance(node, ast.Name) else None


def _mock_names(nodes: list[ast.AST]) -> set[str]:
    """Local names bound to ``unittest.mock`` or to its ``patch``."""
    names: set[str] = set()
    for node in nodes:
        if isinstance(node, ast.Import):
            names |= {alias.asname or alias.name for alias in node.names
                      if alias.name in ("unittest.mock", "mock")}
        elif isinstance(node, ast.ImportFrom) and node.module in ("unittest.mock", "mock",
                                                                   "unittest"):
            names |= {alias.asname or alias.name for alias in node.names
                      if alias.name in ("patch", "mock")}
    return names


def module_patches(source: str, filename: str = "<test>") -> list[str]:
    """``filename:line: what`` for each imported attribute the source replaces (see above)."""
    nodes = list(ast.walk(ast.parse(source, filename)))
    imported, mocks = _imported_names(nodes), _mock_names(nodes)
    found: list[str] = []

    def report(node: ast.AST, what: str) -> None:
        found.append(f"{filename}:{getattr(node, 'lineno', 0)}: {what}")

    for node in nodes:
        if isinstance(node, ast.Call):
            func = node.func
            name = func.attr if isinstance(func, ast.Attribute) else \
                func.id if isinstance(func, ast.Name) else None
            if name in ("setattr", "delattr") and node.args:
                target = node.args[0]
                if isinstance(target, ast.Constant) and isinstance(target.value, str):
                    report(node, f"{name} of the dotted path {target.value!r}")
                elif _root(target) in imported:
                    report(node, f"{name} on the imported {ast.unparse(target)}")
        if mocks and isinstance(node, ast.Name | ast.Attribute) and _root(node) in mocks:
            report(node, f"unittest.mock patching ({ast.unparse(node)})")
        targets: list[ast.AST] = []
        if isinstance(node, ast.Assign):
            targets = list(node.targets)
        elif isinstance(node, ast.AugAssign | ast.AnnAssign):
            targets = [node.target]
        elif isinstance(node, ast.Delete):
            targets = list(node.targets)
        while targets:
            target = targets.pop()
            if isinstance(target, ast.Tuple | ast.List):
                targets += target.elts
            elif isinstance(target, ast.Starred):
                targets.append(target.value)
            elif isinstance(target, ast.Attribute) and _root(target) in imported:
                report(target, f"assignment to the imported {ast.unparse(target)}")
    return sorted(set(found))


def test_no_test_replaces_an_imported_attribute():
    found = []
    for path in sorted(TESTS.rglob("*.py")):
        found += module_patches(path.read_text(encoding="utf-8"), str(path.relative_to(TESTS)))
    assert not found, "imported attributes replaced in tests (use a seam):\n" + "\n".join(found)


def test_the_scan_finds_each_form():
    """Each way of replacing an imported attribute is reported (the scan can fail); a test's own
    objects, environment variables and local attributes are not."""
    bad = {
        "string": 'def t(monkeypatch):\n    monkeypatch.setattr("labrun.cli.run.ask_operator", f)',
        "module": "import labrun.engine\ndef t(monkeypatch):\n"
                  "    monkeypatch.setattr(labrun.engine, 'record_traffic_log', f)",
        "from-module": "def t(monkeypatch):\n    import labrun.inputfile as inputfile\n"
                       "    monkeypatch.setattr(inputfile, 'MAX_TOML_BYTES', 1)",
        "from-package": "from labrun import scpi\nscpi.resource_manager = None",
        "builtin": "import labrun.cli as cli\nsetattr(cli, 'build_parser', None)",
        "del": "from labrun import scpi\ndel scpi.resource_manager",
        "tuple": "import labrun.scpi\na, labrun.scpi.resource_manager = 1, 2",
        "mock": "from unittest import mock\nwith mock.patch('labrun.engine.x'):\n    pass",
        "patch": "from unittest.mock import patch\n@patch('labrun.engine.x')\ndef t(x): pass",
        "class": "from labrun.store.db import Store\ndef t(monkeypatch):\n"
                 "    monkeypatch.setattr(Store, 'create_run', None)",
    }
    for form, source in bad.items():
        assert module_patches(textwrap.dedent(source)), form
    fine = textwrap.dedent("""
        import os
        from labrun.scpi import ScpiSession
        def t(monkeypatch, tmp_path):
            monkeypatch.setenv("CI", "true")
            os.environ["X"] = "1"
            session = ScpiSession("TCPIP0::127.0.0.1::1::SOCKET")
            session.timeout_ms = 5
            monkeypatch.setattr(session, "retries", 0)
        """)
    assert module_patches(fine) == []


# Underscore names that are public API by their library's convention: namedtuple's methods
# (Python documentation, collections.namedtuple) and SQLAlchemy's Row._mapping.
PUBLIC_UNDERSCORE = frozenset({"_replace", "_asdict", "_fields", "_make", "_mapping"})


def private_members(source: str, filename: str = "<test>") -> list[str]:
    """``filename:line: x._name`` for each private member of another object a source touches
    (an object's own, through ``self``/``cls``, aside)."""
    found = []
    for node in ast.walk(ast.parse(source, filename)):
        if isinstance(node, ast.Attribute) and node.attr.startswith("_") \
                and not node.attr.startswith("__") and node.attr not in PUBLIC_UNDERSCORE \
                and not (isinstance(node.value, ast.Name) and node.value.id in ("self", "cls")):
            found.append(f"{filename}:{node.lineno}: {ast.unparse(node)}")
    return sorted(set(found))


def test_no_test_touches_a_private_member():
    found = []
    for path in sorted(TESTS.rglob("*.py")):
        found += private_members(path.read_text(encoding="utf-8"), str(path.relative_to(TESTS)))
    assert not found, "private members of other objects touched in tests:\n" + "\n".join(found)


def test_the_private_scan_can_fail():
    assert private_members("session._res.timeout = 5")
    assert private_members("x = build_parser()._subparsers")
    assert not private_members("class A:\n    def f(self):\n        return self._x\n"
                               "row._mapping\npoint._replace(x=1)\n")


# ------------------------------------------------------------------ labrun/ across its modules

PACKAGE = TESTS.parent / "labrun"

# Underscore names of other libraries that labrun uses knowingly: argparse's
# ``_SubParsersAction`` (the type ``add_subparsers`` returns, for annotations) and
# ``ArgumentParser._print_message`` (argparse's own version action writes through it), and
# pyvisa's ``VisaLibraryBase._registry`` (a replay library drops its cache entry when done).
FOREIGN_UNDERSCORE = frozenset({"_SubParsersAction", "_print_message", "_registry"})


def _defined(tree: ast.AST) -> set[str]:
    """Names a module defines or binds itself (functions, classes, assigned names and
    attributes, parameters): its own private names."""
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef | ast.ClassDef):
            names.add(node.name)
        elif isinstance(node, ast.Name) and isinstance(node.ctx, ast.Store):
            names.add(node.id)
        elif isinstance(node, ast.Attribute) and isinstance(node.ctx, ast.Store):
            names.add(node.attr)
        elif isinstance(node, ast.arg):
            names.add(node.arg)
    return names


def cross_module_private(source: str, filename: str = "<module>") -> list[str]:
    """``filename:line: what`` for each private name of another module a labrun module uses:
    imported (``from labrun.fits import _copolar``) or reached as an attribute
    (``adapter._compound_ok()``) when the module does not define that name itself (an
    object's own members, through ``self``, ``cls`` or ``super()``, aside)."""
    tree = ast.parse(source, filename)
    own = _defined(tree)
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("labrun"):
            found += [f"{filename}:{node.lineno}: from {node.module} import {a.name}"
                      for a in node.names if a.name.startswith("_")
                      and not a.name.startswith("__")]
        elif isinstance(node, ast.Attribute) and node.attr.startswith("_") \
                and not node.attr.startswith("__") and node.attr not in own \
                and node.attr not in PUBLIC_UNDERSCORE | FOREIGN_UNDERSCORE:
            value = node.value
            if isinstance(value, ast.Name) and value.id in ("self", "cls"):
                continue
            if isinstance(value, ast.Call) and isinstance(value.func, ast.Name) \
                    and value.func.id == "super":
                continue
            found.append(f"{filename}:{node.lineno}: {ast.unparse(node)}")
    return sorted(set(found))


def test_no_labrun_module_uses_another_modules_private_names():
    """What one module uses of another is public, with a docstring (issue 14)."""
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        found += cross_module_private(path.read_text(encoding="utf-8"),
                                      str(path.relative_to(PACKAGE.parent)))
    assert not found, "private names used across labrun's modules:\n" + "\n".join(found)


def test_the_cross_module_scan_can_fail():
    assert cross_module_private("from labrun.fits import _copolar\n")
    assert cross_module_private("def f(adapter):\n    return adapter._compound_ok()\n")
    assert cross_module_private("from labrun import fits\nfits._copolar(1)\n")
    fine = ("class A:\n    def _x(self):\n        return super()._y() + self._z\n"
            "def f(a: A):\n    return a._x()\n"  # defined in this module: its own business
            "from labrun.fits import copolar\nrow._mapping\n")
    assert cross_module_private(fine) == []
