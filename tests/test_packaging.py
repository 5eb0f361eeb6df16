"""The package installs as ionotrail.terminal and ionotrail.harness, and nothing uses the old names."""

from __future__ import annotations

import ast
import subprocess
import sys
import tomllib
from pathlib import Path

import ionotrail

ROOT = Path(__file__).resolve().parent.parent
OLD_TOP_LEVEL = {"terminal", "harness"}


def _python_files() -> list[Path]:
    return [p for d in ("terminal", "harness", "tests") for p in (ROOT / d).rglob("*.py")]


def test_no_module_imports_the_old_top_level_names() -> None:
    offenders = []
    for path in _python_files():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            else:
                continue
            offenders += [f"{path.relative_to(ROOT)}:{node.lineno} {n}" for n in names if n.split(".")[0] in OLD_TOP_LEVEL]
    assert offenders == []


def test_declared_packages_match_the_folders() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    folders = {"ionotrail"}
    for top in ("terminal", "harness"):
        for init in (ROOT / top).rglob("__init__.py"):
            rel = init.parent.relative_to(ROOT / top)
            if rel.parts[:1] == ("root",):
                continue  # harness/root/ is the ionotrail package itself
            folders.add(".".join(("ionotrail", top, *rel.parts)))
    assert set(config["packages"]) == folders
    assert config["package-dir"] == {"ionotrail": "harness/root", "ionotrail.terminal": "terminal", "ionotrail.harness": "harness"}


def test_version_and_module_entry_point(tmp_path: Path) -> None:
    # From a folder outside the checkout, so only the installed package can answer.
    run = subprocess.run([sys.executable, "-m", "ionotrail", "--version"], capture_output=True, text=True, cwd=tmp_path, timeout=60, check=False)
    assert run.returncode == 0, run.stderr
    assert run.stdout.strip() == f"ionotrail {ionotrail.__version__}"
    assert ionotrail.__version__ != "0+unknown"
