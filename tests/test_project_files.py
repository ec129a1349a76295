"""Project bookkeeping CI relies on: one version source, runtime dependencies = what runtime code imports.

Source: common practice (PEP 621 project metadata; a declared dependency nobody imports, or an import
nobody declared, breaks installs silently).
"""

from __future__ import annotations

import ast
import re
import sys
from pathlib import Path

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

from landcheck.about import __version__

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
#: declared for what they do behind another package's import, each explained in docs/dependencies.md
INDIRECT = {"pyarrow": "geopandas.read_parquet", "dask": "distributed"}
#: import names that differ from the distribution's name (common practice)
DISTRIBUTION_OF = {"pil": "pillow"}


def _name(requirement: str) -> str:
    return re.split(r"[\s\[<>=!~;]", requirement, maxsplit=1)[0].lower().replace("_", "-")


def _runtime_imports() -> dict[str, str]:
    found = {}
    for path in sorted((ROOT / "landcheck").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            for n in names:
                top = n.split(".")[0]
                if top != "landcheck" and top not in sys.stdlib_module_names:
                    name = top.lower().replace("_", "-")
                    found.setdefault(DISTRIBUTION_OF.get(name, name), str(path.relative_to(ROOT)))
    return found


def test_version_has_one_source():
    assert "version" not in PYPROJECT["project"] and "version" in PYPROJECT["project"]["dynamic"]
    assert PYPROJECT["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "landcheck.about.__version__"}
    assert re.fullmatch(r"\d+\.\d+\.\d+(\.dev\d+|rc\d+)?", __version__)
    writers = []
    for folder in ("landcheck", "tests", "scripts", "docs"):
        for path in (ROOT / folder).rglob("*"):
            if path.suffix in {".py", ".md", ".toml"} and path != Path(__file__).resolve():
                text = path.read_text(encoding="utf-8")
                if re.search(r"__version__\s*=", text) or re.search(r"\"(version|landcheck)\": \"\d+\.\d+", text):
                    writers.append(str(path.relative_to(ROOT)))
    assert writers == ["landcheck/about.py"]
    # the changelog has a section for the current version
    assert f"## {__version__}" in (ROOT / "CHANGELOG.md").read_text(encoding="utf-8")


def test_runtime_dependencies_are_what_runtime_code_imports():
    declared = {_name(r) for r in PYPROJECT["project"]["dependencies"]}
    imported = _runtime_imports()
    undeclared = {m: where for m, where in imported.items() if m not in declared}
    assert not undeclared, f"imported by runtime code but not in [project] dependencies: {undeclared}"
    unused = declared - set(imported) - set(INDIRECT)
    assert not unused, f"declared but never imported by runtime code: {sorted(unused)}"


def test_test_and_dev_tools_stay_out_of_the_runtime_list():
    declared = {_name(r) for r in PYPROJECT["project"]["dependencies"]}
    extras = PYPROJECT["project"]["optional-dependencies"]
    for tool in ("exactextract", "pytest", "selenium", "rasterstats", "hypothesis"):
        assert tool in {_name(r) for r in extras["test"]} and tool not in declared
    dev = {_name(r): r for r in extras["dev"]}
    assert {"ruff", "mypy", "pre-commit"} <= set(dev)
    assert all("==" in r for r in dev.values())  # checkers pinned: a new release cannot fail CI on its own
