"""The engine's shape (issue 14): one process, data flowing one way, no private pandas.

Imports are read from the source (module level and inside functions; hint-only imports under
``TYPE_CHECKING`` do not run and are left out), so the checks see what the interpreter would do.
"""

from __future__ import annotations

import ast
from pathlib import Path

import audit

PACKAGE = Path(audit.__file__).parent


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path
    return out


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _imports(path: Path, known: set[str]) -> set[str]:
    """The package's modules that ``path`` imports when it runs."""
    found: set[str] = set()

    def visit(node: ast.AST) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.If) and _is_type_checking(child):
                for other in child.orelse:
                    visit(other)
                continue
            if isinstance(child, ast.Import):
                found.update(a.name for a in child.names)
            elif isinstance(child, ast.ImportFrom) and child.module and not child.level:
                found.add(child.module)
                found.update(f"{child.module}.{a.name}" for a in child.names)
            visit(child)

    visit(ast.parse(path.read_text("utf-8")))
    return {name for name in found if name in known}


def test_no_import_circle_in_the_package():
    modules = _modules()
    known = set(modules)
    graph = {name: _imports(path, known) - {name} for name, path in modules.items()}
    # A package imports its own submodules to re-export them; that is not a circle.
    for name in graph:
        graph[name] = {m for m in graph[name] if not m.startswith(name + ".")}
    for name in graph:
        graph[name] -= {m for m in graph[name] if name.startswith(m + ".")}
    state: dict[str, int] = {}
    path: list[str] = []

    def walk(node: str) -> None:
        state[node] = 1
        path.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                cycle = [*path[path.index(nxt) :], nxt]
                raise AssertionError("import circle: " + " -> ".join(cycle))
            if nxt not in state:
                walk(nxt)
        path.pop()
        state[node] = 2

    for name in sorted(graph):
        if name not in state:
            walk(name)


def test_checker_finds_a_circle(tmp_path, monkeypatch):
    # The check above must be able to fail: two modules importing each other are found.
    (tmp_path / "pkg").mkdir()
    (tmp_path / "pkg" / "__init__.py").write_text("")
    (tmp_path / "pkg" / "a.py").write_text("def f():\n    from pkg import b\n")
    (tmp_path / "pkg" / "b.py").write_text("import pkg.a\n")
    monkeypatch.setattr(audit, "__file__", str(tmp_path / "pkg" / "__init__.py"))
    global PACKAGE
    saved, PACKAGE = PACKAGE, tmp_path / "pkg"
    try:
        try:
            test_no_import_circle_in_the_package()
        except AssertionError as exc:
            assert "pkg.a -> pkg.b -> pkg.a" in str(exc)
        else:
            raise AssertionError("the circle was not found")
    finally:
        PACKAGE = saved


def test_one_process_and_public_pandas_only():
    for path in PACKAGE.rglob("*.py"):
        text = path.read_text("utf-8")
        assert "os.fork" not in text and "_exit(" not in text, path
        assert "pandas._libs" not in text, path
        assert "multiprocessing" not in text, path


def test_a_result_is_plain_data():
    import dataclasses

    from audit.result import AuditResult

    names = {f.name for f in dataclasses.fields(AuditResult)}
    assert names == {
        "table", "metrics", "status", "errors", "notes", "findings", "portfolio", "settings",
        "raw", "rules", "rules_waiting", "rule_problems", "caveats", "rules_judged", "groups",
    }  # fmt: skip
