"""Facts about the project itself: layout, layering, the README's commands and CI."""

from __future__ import annotations

import ast
import re
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
LAYERS = {"solver": 0, "schemas": 1, "pipeline": 2, "api": 3, "cli": 4}
#: What each layer must never import (the design notes' one-direction rule).
FORBIDDEN_IN_SOLVER = {"fastapi", "pydantic", "pydantic_settings", "starlette", "json", "uvicorn"}


def _tracked_files() -> list[Path]:
    """The files git tracks (what a checkout holds); every file when this is no git checkout."""
    try:
        listed = subprocess.run(
            ["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True, timeout=60
        ).stdout.decode()
    except (OSError, subprocess.SubprocessError):
        return [p for p in ROOT.rglob("*") if p.is_file() and ".git" not in p.parts]
    return [ROOT / name for name in listed.split("\0") if name and (ROOT / name).is_file()]


def test_top_level_is_exactly_the_agreed_set():
    visible = {p.relative_to(ROOT).parts[0] for p in _tracked_files()}
    visible = {name for name in visible if not name.startswith(".")}
    assert visible <= {"README.md", "DEVELOPERS.md", "pyproject.toml", "service", "tests", "openapi", "deploy"}
    assert {"README.md", "DEVELOPERS.md", "pyproject.toml", "service", "tests", "openapi"} <= visible


def _imports(path: Path) -> set[str]:
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names |= {a.name for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            names.add(node.module)
    return names


def _layer(module: str) -> int | None:
    parts = module.split(".")
    if parts[0] != "service" or len(parts) < 2:
        return None
    return LAYERS.get(parts[1])


@pytest.mark.parametrize("path", sorted((ROOT / "service").rglob("*.py")), ids=lambda p: str(p.relative_to(ROOT)))
def test_each_layer_imports_only_the_layers_below(path):
    relative = path.relative_to(ROOT / "service")
    own = LAYERS.get(relative.parts[0].removesuffix(".py"))
    if own is None:
        return
    for module in _imports(path):
        other = _layer(module)
        assert other is None or other <= own, f"{relative} imports {module}"
        if own == 0:
            assert module.split(".")[0] not in FORBIDDEN_IN_SOLVER, f"{relative} imports {module}"


def _readme_commands() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    quick = text.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```sh\n(.+?)\n```", quick)


def test_readme_quick_start_is_two_commands_serve_and_test():
    serve, test = _readme_commands()[:2]
    assert "movecast serve" in serve and "pip install ." in serve
    assert "pip install '.[test]'" in test and "pytest" in test


def test_ci_runs_the_readme_test_command_verbatim():
    test = _readme_commands()[1]
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    assert test in ci.splitlines()


def test_no_machine_paths_in_the_project():
    pattern = re.compile(r"(?<![\w.])/(work|tmp/venv|root)/")
    for path in _tracked_files():
        if path.suffix in {".py", ".md", ".toml", ".json", ".yaml", ".yml", ".js", ".css", ".html", ".csv", ""}:
            text = path.read_text(encoding="utf-8", errors="ignore")
            assert not pattern.search(text), f"machine path in {path.relative_to(ROOT)}"


@pytest.mark.parametrize(
    "command",
    [
        ["ruff", "check", "service", "tests", "openapi"],
        ["ruff", "format", "--check", "service", "tests", "openapi"],
        ["mypy"],
    ],
    ids=["ruff-check", "ruff-format", "mypy"],
)
def test_the_tree_is_clean_for_the_linter_formatter_and_type_checker(command):
    # The configuration is in pyproject.toml (mypy strict on the solver); any finding fails.
    import shutil
    import sys

    tool = shutil.which(command[0], path=str(Path(sys.executable).parent)) or shutil.which(command[0])
    assert tool is not None, f"{command[0]} is not installed; it is in the test extra"
    result = subprocess.run([tool, *command[1:]], cwd=ROOT, capture_output=True, text=True, timeout=900)
    assert result.returncode == 0, result.stdout + result.stderr
