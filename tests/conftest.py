"""Shared test configuration: the ngspice marker policy.

Tests marked ``@pytest.mark.ngspice`` need the ngspice simulator. When it is absent they
are skipped, unless the environment variable STAGEFRONT_REQUIRE_NGSPICE=1 is set (CI sets
it): then each of them fails, so a missing simulator can never pass as a green run.
The executable is found by `optimise.ngspice.find_executable` (PATH, or
STAGEFRONT_NGSPICE).
"""
from __future__ import annotations

import os

import pytest

from optimise import ngspice

REQUIRE_ENV = "STAGEFRONT_REQUIRE_NGSPICE"
_MISSING = pytest.StashKey[str]()  # set on marked items that must fail: ngspice required but absent


def pytest_configure(config: pytest.Config) -> None:
    # Also declared in pyproject.toml; repeated here so the policy works on its own.
    config.addinivalue_line(
        "markers", "ngspice: needs the ngspice simulator (skipped when absent unless STAGEFRONT_REQUIRE_NGSPICE=1)"
    )


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    marked = [item for item in items if item.get_closest_marker("ngspice") is not None]
    if not marked or ngspice.available():
        return
    where = os.environ.get(ngspice.ENV_EXECUTABLE, "").strip() or "ngspice on PATH"
    if os.environ.get(REQUIRE_ENV) == "1":
        reason = f"ngspice is required ({REQUIRE_ENV}=1) but was not found ({where})"
        for item in marked:
            item.stash[_MISSING] = reason
    else:
        skip = pytest.mark.skip(reason=f"ngspice not found ({where}); set {REQUIRE_ENV}=1 to make this a failure")
        for item in marked:
            item.add_marker(skip)


@pytest.hookimpl(tryfirst=True)
def pytest_runtest_call(item: pytest.Item) -> None:
    # Fail in the call phase (reported as FAILED, not as a setup error or a skip).
    reason = item.stash.get(_MISSING, None)
    if reason is not None:
        pytest.fail(reason, pytrace=False)
