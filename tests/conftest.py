"""Shared test configuration: the policy for tests that need an outside program.

Tests marked ``@pytest.mark.ngspice`` need the ngspice simulator; tests marked
``@pytest.mark.browser`` need headless Chromium, its chromedriver and the selenium package.
When what a marker needs is absent its tests are skipped, unless the marker's environment
variable is set to 1 (CI sets both): then each of them fails, so a missing program can never
pass as a green run.

- ngspice: found by `optimise.spice.ngspice.find_executable` (PATH, or STAGEFRONT_NGSPICE);
  STAGEFRONT_REQUIRE_NGSPICE=1 makes its absence a failure.
- browser: Chromium from STAGEFRONT_CHROMIUM or `chromium` / `chromium-browser` on PATH,
  the driver from STAGEFRONT_CHROMEDRIVER or `chromedriver` on PATH (Debian packages
  `chromium` and `chromium-driver`); STAGEFRONT_REQUIRE_BROWSER=1 makes their absence a
  failure. The `chromium` fixture gives the two paths.
"""
from __future__ import annotations

import importlib.util
import os
import shutil

import pytest

from optimise.spice import ngspice

# pytest.approx adds an absolute tolerance of 1e-12 to every relative one. In SI units the
# currents (nA), capacitances (fF) and sensitivities compared here sit at or below it, so a
# comparison such as approx(1e-9 A, rel=1e-9) would accept anything under a picoampere. No
# absolute floor, then: a test that needs one says abs= itself, with its reason.
# The class of a scalar approx (its module moved between pytest releases: python_api, approx).
ApproxScalar = type(pytest.approx(1.0))
if not hasattr(ApproxScalar, "DEFAULT_ABSOLUTE_TOLERANCE"):
    raise RuntimeError(f"pytest {pytest.__version__}: approx has no DEFAULT_ABSOLUTE_TOLERANCE to set to 0")
ApproxScalar.DEFAULT_ABSOLUTE_TOLERANCE = 0.0

REQUIRE_ENV = "STAGEFRONT_REQUIRE_NGSPICE"
BROWSER_REQUIRE_ENV = "STAGEFRONT_REQUIRE_BROWSER"
_MISSING = pytest.StashKey[str]()  # set on marked items that must fail: a required program is absent


def chromium_paths() -> tuple[str | None, str | None]:
    """(Chromium executable, chromedriver executable); None for what is not found."""
    browser = os.environ.get("STAGEFRONT_CHROMIUM", "").strip() or shutil.which("chromium") \
        or shutil.which("chromium-browser")
    driver = os.environ.get("STAGEFRONT_CHROMEDRIVER", "").strip() or shutil.which("chromedriver")
    return (browser if browser and os.access(browser, os.X_OK) else None,
            driver if driver and os.access(driver, os.X_OK) else None)


def _browser_missing() -> str:
    """What the browser tests lack, or "" when they can run."""
    browser, driver = chromium_paths()
    lacking = [what for what, ok in (("Chromium (chromium)", browser), ("chromedriver (chromium-driver)", driver),
                                     ("the selenium package", importlib.util.find_spec("selenium"))) if not ok]
    return ", ".join(lacking)


def _ngspice_missing() -> str:
    if ngspice.available():
        return ""
    return os.environ.get(ngspice.ENV_EXECUTABLE, "").strip() or "ngspice on PATH"


# marker -> (description, environment variable that makes absence a failure, what is missing)
POLICIES = {
    "ngspice": ("needs the ngspice simulator (skipped when absent unless STAGEFRONT_REQUIRE_NGSPICE=1)",
                REQUIRE_ENV, _ngspice_missing),
    "browser": ("needs headless Chromium, chromedriver and selenium (skipped when absent unless "
                "STAGEFRONT_REQUIRE_BROWSER=1)", BROWSER_REQUIRE_ENV, _browser_missing),
}


def pytest_configure(config: pytest.Config) -> None:
    # Also declared in pyproject.toml; repeated here so the policy works on its own.
    for name, (text, _, _) in POLICIES.items():
        config.addinivalue_line("markers", f"{name}: {text}")


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for name, (_, env, missing) in POLICIES.items():
        marked = [item for item in items if item.get_closest_marker(name) is not None]
        if not marked:
            continue
        what = missing()
        if not what:
            continue
        if os.environ.get(env) == "1":
            reason = f"{name} tests are required ({env}=1) but this was not found: {what}"
            for item in marked:
                item.stash[_MISSING] = reason
        else:
            skip = pytest.mark.skip(reason=f"not found: {what}; set {env}=1 to make this a failure")
            for item in marked:
                item.add_marker(skip)


@pytest.hookimpl(tryfirst=True)
def pytest_runtest_call(item: pytest.Item) -> None:
    # Fail in the call phase (reported as FAILED, not as a setup error or a skip).
    reason = item.stash.get(_MISSING, None)
    if reason is not None:
        pytest.fail(reason, pytrace=False)


@pytest.fixture(scope="session")
def chromium() -> tuple[str | None, str | None]:
    """(Chromium, chromedriver) executables for tests marked `browser`.

    Only used by marked tests, so a missing program has already turned the test into a
    skip (set up before fixtures) or a failure (in the call phase) by the policy above.
    """
    return chromium_paths()
