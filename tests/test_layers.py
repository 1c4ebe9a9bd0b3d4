"""The layer contracts of pyproject.toml ([tool.importlinter]), one test per contract: the
core is pure, the store and the actions sit below the API, the technician's client never
touches the store. A failure names the contract and shows import-linter's import chain."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from importlinter.api import read_configuration

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "pyproject.toml"
CONTRACTS = {c["id"]: c["name"] for c in read_configuration(str(CONFIG))["contracts_options"]}


def test_the_layers_have_their_contracts() -> None:
    assert {"core-is-pure", "store-below-api", "actions-below-api", "client-without-store"} <= set(CONTRACTS)


@pytest.mark.parametrize("contract", sorted(CONTRACTS))
def test_layer_contract(contract: str) -> None:
    # the import graph is built from this checkout's source, whatever is installed
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "service"), os.environ.get("PYTHONPATH", "")]),
           "COLUMNS": "200"}
    run = subprocess.run(
        [sys.executable, "-c", "import sys; from importlinter.cli import lint_imports_command as c; sys.exit(c())",
         str(CONFIG), "--contract", contract, "--no-cache", "--no-logo"],
        cwd=ROOT, env=env, capture_output=True, text=True, timeout=300, check=False)
    report = run.stdout + run.stderr
    assert run.returncode == 0, f"layer contract {contract!r} broken: {CONTRACTS[contract]}\n{report}"
    assert "1 kept, 0 broken" in report, report
