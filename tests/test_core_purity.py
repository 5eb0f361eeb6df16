"""The protocol core does no I/O: no clock, no sockets, no serial, no ambient randomness."""

from __future__ import annotations

import ast
from pathlib import Path

TERMINAL = Path(__file__).resolve().parent.parent / "terminal"
FORBIDDEN = {
    "asyncio", "socket", "serial", "time", "random", "os", "selectors", "threading", "datetime",
    "subprocess", "pathlib", "secrets", "uuid", "signal", "shutil", "tempfile", "glob", "logging", "sqlite3",
}
BUILTINS_THAT_DO_IO = {"open", "print", "input"}
# The service, port adapters and stores bind the core to the outside world; they alone may.
SHELL = {"service.py", "ports", "stores"}


def _core_modules() -> list[Path]:
    return [p for p in TERMINAL.rglob("*.py") if not (set(p.relative_to(TERMINAL).parts) & SHELL)]


def _imports(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


def test_core_imports_nothing_that_does_io() -> None:
    modules = _core_modules()
    assert len(modules) >= 5
    offenders = {str(p.relative_to(TERMINAL)): sorted(_imports(p) & FORBIDDEN) for p in modules}
    assert {k: v for k, v in offenders.items() if v} == {}


def _io_calls(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    return {
        node.func.id
        for node in ast.walk(tree)
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in BUILTINS_THAT_DO_IO
    }


def test_core_calls_no_builtin_that_does_io() -> None:
    offenders = {str(p.relative_to(TERMINAL)): sorted(_io_calls(p)) for p in _core_modules()}
    assert {k: v for k, v in offenders.items() if v} == {}


def test_the_check_sees_a_forbidden_import(tmp_path: Path) -> None:
    sample = tmp_path / "sample.py"
    sample.write_text("import os.path\nfrom time import monotonic\nfrom . import sibling\n")
    assert _imports(sample) & FORBIDDEN == {"os", "time"}
    sample.write_text("print('x')\nwith open('f') as f: pass\n")
    assert _io_calls(sample) == {"print", "open"}
