"""Every CLI module imports on its own, and the command group registers every command module.

Source: common practice (a module that imports only after another one has been imported hides an import
cycle; Python's import system then hands out a partially initialised module).
"""

from __future__ import annotations

import os
import pkgutil
import subprocess
import sys
from pathlib import Path

import pytest

import landcheck.cli

ROOT = Path(__file__).resolve().parents[1]
CLI_MODULES = sorted(m.name for m in pkgutil.iter_modules(landcheck.cli.__path__))


def test_cli_modules_found():
    # the folder holds the entry point, the shared pieces and one module per command
    assert {"main", "options", "errors"} <= set(CLI_MODULES)
    assert sum(name.endswith("_cmd") for name in CLI_MODULES) >= 5


@pytest.mark.parametrize("name", CLI_MODULES)
def test_cli_module_imports_in_fresh_interpreter(name):
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")])}
    proc = subprocess.run(
        [sys.executable, "-c", f"import landcheck.cli.{name}"], cwd=ROOT, env=env, capture_output=True, text=True
    )
    assert proc.returncode == 0, proc.stderr


def test_every_command_module_is_registered():
    import importlib

    import click

    from landcheck.cli.main import cli

    registered = set(cli.commands.values())
    for name in CLI_MODULES:
        if not name.endswith("_cmd"):
            continue
        mod = importlib.import_module(f"landcheck.cli.{name}")
        commands = [obj for obj in vars(mod).values() if isinstance(obj, click.Command) and obj in registered]
        assert commands, f"landcheck.cli.{name} defines no command registered in landcheck.cli.main"
