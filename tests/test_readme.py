"""README's two commands are the ones CI runs (from a clean clone, in a fresh virtual
environment, through .ci/run), and each starts by making that environment: a stock Debian
Python refuses `pip install` outside one (PEP 668, "externally-managed-environment")."""
from __future__ import annotations

import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
CI = ROOT / ".ci" / "run"


def readme_command(key: str) -> str:
    """The first line of the sh block after the README line starting with `key` (as .ci/run reads it)."""
    lines = (ROOT / "README.md").read_text().splitlines()
    start = next(k for k, ln in enumerate(lines) if ln.startswith(key))
    block = next(k for k in range(start + 1, len(lines)) if lines[k].startswith("```sh"))
    return lines[block + 1]


@pytest.mark.parametrize("key, tail", [("Set up and run the shipped demo study", "--overwrite"),
                                       ("Set up and run the tests:", "python -m pytest -q")])
def test_readme_commands_make_and_use_a_virtual_environment(key, tail):
    cmd = readme_command(key)
    assert cmd.startswith("python3 -m venv .venv && . .venv/bin/activate && python -m pip install ")
    assert cmd.endswith(tail)


def test_ci_runs_the_readme_commands_from_a_clean_clone():
    text = CI.read_text()
    for needed in ("readme_command 'Set up and run the shipped demo study'",
                   "readme_command 'Set up and run the tests:'", "git clone", "python3-venv", "ngspice chromium chromium-driver", "STAGEFRONT_REQUIRE_NGSPICE=1",
                   "STAGEFRONT_REQUIRE_BROWSER=1", 'bash -euo pipefail -c "$test_cmd"'):
        assert needed in text, needed
    # .ci/run's own extraction gives the same lines as the README reading above
    script = text.split("readme_command() {", 1)[1].split("\n}\n", 1)[0]
    for key in ("Set up and run the shipped demo study", "Set up and run the tests:"):
        shell = f'repo="{ROOT}"; readme_command() {{{script}\n}}; readme_command "{key}"'
        got = subprocess.run(["bash", "-c", shell], capture_output=True, text=True, check=True).stdout.strip()
        assert got == readme_command(key)
