"""optimise.spice.ngspice: rawfile parsing, executable lookup, error reporting, model cards, and
the ngspice marker policy of tests/conftest.py.

Tests without the `ngspice` marker use synthetic rawfiles or a stand-in shell script, so
they run everywhere; the marked ones run the real simulator.
"""
from __future__ import annotations

import math
import os
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from models.devices.mos import at_conditions
from models.devices.tech import ModelKind, MosTech, Polarity
from optimise.spice import ngspice

CONFTEST = Path(__file__).with_name("conftest.py")
posix_only = pytest.mark.skipif(os.name != "posix", reason="stand-in executable is a shell script")


def tech(va_per_l: float = 2.5e7) -> MosTech:
    # [AH02] Table 3.1-2 NMOS: VT0 0.7 V, K' 110 uA/V^2, gamma 0.4, 2|phiF| 0.7 V; 2.5e7 V/m is lambda 0.04 /V at 1 um.
    return MosTech(
        vt0=0.7, kp=110e-6, n=1.3, gamma=0.4, phi=0.7, va_per_l=va_per_l, tc_vt=2.3e-3, mu_exp=-1.5,
        a_vt=5e-9, a_beta=1e-8, cox=2.3e-3, cov=2e-10, w_min=1e-6, l_min=1e-6,
    )


def card_fields(card: str) -> dict[str, float]:
    inner = card[card.index("(") + 1:card.rindex(")")]
    return {k: float(v) for k, v in (f.split("=") for f in inner.split())}


# ---------------------------------------------------------------------------------------
# Rawfile parsing (no simulator needed)
# ---------------------------------------------------------------------------------------
ASCII_TWO_OPS = textwrap.dedent("""\
    Title: two operating points
    Date: today
    Plotname: Operating Point
    Flags: real
    No. Variables: 2
    No. Points: 1
    Variables:
    \t0\tv(out)\tvoltage
    \t1\ti(vdd)\tcurrent
    Values:
    0\t\t1.500000000000000e+00
    \t-2.000000000000000e-05
    Title: two operating points
    Date: today
    Plotname: Operating Point
    Flags: real
    No. Variables: 2
    No. Points: 1
    Variables:
    \t0\tv(out)\tvoltage
    \t1\ti(vdd)\tcurrent
    Values:
    0\t\t1.600000000000000e+00
    \t-3.000000000000000e-05
    """).encode()


def test_parse_ascii_rawfile_plots():
    plots = ngspice.parse_raw(ASCII_TWO_OPS)
    assert [p.name for p in plots] == ["Operating Point"] * 2
    assert plots[1].vectors["v(out)"].tolist() == [1.6]
    assert plots[1].vectors["i(vdd)"].tolist() == [-3e-5]


def test_join_plots_stacks_repeated_operating_points():
    joined = ngspice.join_plots(ngspice.parse_raw(ASCII_TWO_OPS))
    np.testing.assert_array_equal(joined["v(out)"], [1.5, 1.6])
    np.testing.assert_array_equal(joined["i(vdd)"], [-2e-5, -3e-5])


def test_join_plots_refuses_mixed_kinds():
    plots = ngspice.parse_raw(ASCII_TWO_OPS)
    plots[1].name = "DC transfer characteristic"
    with pytest.raises(ngspice.NgspiceError, match="run_plots"):
        ngspice.join_plots(plots)


def _binary_raw(name: str, flags: str, variables: list[tuple[str, str]], block: np.ndarray) -> bytes:
    head = ["Title: synthetic", f"Plotname: {name}", f"Flags: {flags}", f"No. Variables: {len(variables)}",
            f"No. Points: {block.shape[0]}       ", "Variables:"]
    head += [f"\t{j}\t{n}\t{t}" for j, (n, t) in enumerate(variables)]
    return ("\n".join(head) + "\nBinary:\n").encode() + block.astype("<f8").tobytes()


def test_parse_binary_rawfile_keeps_doubles_exactly():
    x = np.array([[0.0, 1 / 3], [0.5, math.pi], [1.0, -1e-300]])
    raw = _binary_raw("DC transfer characteristic", "real", [("v(v-sweep)", "voltage"), ("i(vd)", "current")], x)
    (plot,) = ngspice.parse_raw(raw + raw)[:1]
    np.testing.assert_array_equal(plot.vectors["i(vd)"], x[:, 1])
    assert len(ngspice.parse_raw(raw + raw)) == 2


def test_parse_binary_complex_plot_keeps_frequency_real():
    # ngspice leaves the imaginary half of a real scale uninitialised in complex plots.
    block = np.array([[10.0, 7e101, 0.5, -0.25], [100.0, -3e-200, 0.1, -0.3]])
    raw = _binary_raw("AC Analysis", "complex", [("frequency", "frequency"), ("v(b)", "voltage")], block)
    (plot,) = ngspice.parse_raw(raw)
    assert plot.vectors["frequency"].dtype == float
    np.testing.assert_array_equal(plot.vectors["frequency"], [10.0, 100.0])
    np.testing.assert_array_equal(plot.vectors["v(b)"], [0.5 - 0.25j, 0.1 - 0.3j])


# ---------------------------------------------------------------------------------------
# Executable lookup and failures (a stand-in script instead of ngspice)
# ---------------------------------------------------------------------------------------
def _stand_in(tmp_path: Path, body: str) -> str:
    exe = tmp_path / "fake-ngspice"
    exe.write_text("#!/bin/sh\n" + body + "\n")
    exe.chmod(0o755)
    return str(exe)


@posix_only
def test_environment_variable_overrides_the_executable(tmp_path, monkeypatch):
    exe = _stand_in(tmp_path, "exit 0")
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, exe)
    assert ngspice.find_executable() == exe


def test_missing_override_means_unavailable(tmp_path, monkeypatch):
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, str(tmp_path / "no-such-ngspice"))
    assert not ngspice.available()
    with pytest.raises(ngspice.NgspiceError, match=ngspice.ENV_EXECUTABLE):
        ngspice.run("title\n.op\n.end\n")


@posix_only
def test_error_carries_ngspice_message(tmp_path, monkeypatch):
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, _stand_in(tmp_path, 'echo "Error on line 3: bad thing" >&2; exit 1'))
    with pytest.raises(ngspice.NgspiceError, match="bad thing") as info:
        ngspice.run("title\n.op\n.end\n")
    assert info.value.returncode == 1


@posix_only
def test_timeout_is_an_ngspice_error(tmp_path, monkeypatch):
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, _stand_in(tmp_path, "exec sleep 5"))
    with pytest.raises(ngspice.NgspiceError, match="did not finish"):
        ngspice.run("title\n.op\n.end\n", timeout=0.3)


@posix_only
def test_missing_rawfile_is_an_error(tmp_path, monkeypatch):
    monkeypatch.setenv(ngspice.ENV_EXECUTABLE, _stand_in(tmp_path, "exit 0"))
    with pytest.raises(ngspice.NgspiceError, match="no rawfile"):
        ngspice.run("title\n.op\n.end\n")


# ---------------------------------------------------------------------------------------
# Model cards
# ---------------------------------------------------------------------------------------
def test_nmos_card_fields():
    card = ngspice.level1_model_card("mn", tech(), Polarity.N, 1e-6)
    assert card.startswith(".model mn nmos (")
    # lambda = 1 / (2.5e7 V/m * 1 um) = 0.04 /V ([AH02] Table 3.1-2); tnom 27 degC.
    assert card_fields(card) == pytest.approx(
        {"level": 1, "vto": 0.7, "kp": 110e-6, "gamma": 0.4, "phi": 0.7, "lambda": 0.04, "tnom": 27.0}, rel=1e-15
    )


def test_pmos_card_has_negative_vto():
    fields = card_fields(ngspice.level1_model_card("mp", tech(), Polarity.P, 2e-6))
    assert fields["vto"] == -0.7
    assert fields["lambda"] == pytest.approx(0.02, rel=1e-15)  # twice the length, half the lambda


def test_card_without_length_modulation_has_zero_lambda():
    assert card_fields(ngspice.level1_model_card("mn", tech(math.inf), 1, 1e-6))["lambda"] == 0.0


def test_card_at_temperature_holds_the_shifted_constants():
    temp = 353.15
    fields = card_fields(ngspice.level1_model_card("mn", tech(), Polarity.N, 1e-6, temp=temp))
    m = at_conditions(tech(), Polarity.N, ModelKind.SQUARE_LAW, temp, 300.15)
    assert fields["tnom"] == 80.0
    assert fields["vto"] == pytest.approx(float(m.vt0), rel=1e-15)
    assert fields["kp"] == pytest.approx(float(m.kp), rel=1e-15)


# ---------------------------------------------------------------------------------------
# The real simulator
# ---------------------------------------------------------------------------------------
DIVIDER = "divider\nv1 a 0 2\nr1 a b 1k\nr2 b 0 3k\n"


@pytest.mark.ngspice
def test_run_returns_named_vectors():
    res = ngspice.run(DIVIDER + ".op\n.end\n")
    # Hand calc: 2 V * 3k / 4k = 1.5 V; 0.5 mA flows out of the + node, so i(v1) = -0.5 mA.
    assert res["v(b)"] == pytest.approx([1.5], rel=1e-12)
    assert res["i(v1)"] == pytest.approx([-0.5e-3], rel=1e-12)


@pytest.mark.ngspice
def test_control_block_with_alter_gives_one_point_per_run():
    deck = DIVIDER + textwrap.dedent(f"""\
        .control
        set appendwrite
        op
        write {ngspice.RAWFILE} v(b)
        alter v1 dc=4
        op
        write {ngspice.RAWFILE} v(b)
        .endc
        .end
        """)
    assert ngspice.run(deck)["v(b)"] == pytest.approx([1.5, 3.0], rel=1e-12)


@pytest.mark.ngspice
def test_mixed_analyses_need_run_plots():
    deck = DIVIDER + ".op\n.dc v1 0 2 1\n.end\n"
    with pytest.raises(ngspice.NgspiceError, match="run_plots"):
        ngspice.run(deck)
    kinds = sorted(p.name for p in ngspice.run_plots(deck))
    assert kinds == ["DC transfer characteristic", "Operating Point"]


@pytest.mark.ngspice
def test_unknown_model_raises_with_ngspice_message():
    with pytest.raises(ngspice.NgspiceError, match="(?i)model"):
        ngspice.run("bad\nv1 g 0 1\nm1 g g 0 0 nosuchmodel w=1u l=1u\n.op\n.end\n")


@pytest.mark.ngspice
def test_control_block_that_writes_nothing_is_an_error():
    with pytest.raises(ngspice.NgspiceError, match=ngspice.RAWFILE):
        ngspice.run(DIVIDER + ".control\nop\n.endc\n.end\n")


# ---------------------------------------------------------------------------------------
# Marker policy of tests/conftest.py, run in a child pytest with ngspice made unavailable
# ---------------------------------------------------------------------------------------
MARKED_TEST = "import pytest\n\n@pytest.mark.ngspice\ndef test_needs_ngspice():\n    pass\n"


def _child_pytest(tmp_path: Path, require: bool) -> subprocess.Popen:
    folder = tmp_path / ("required" if require else "optional")
    folder.mkdir()
    shutil.copy(CONFTEST, folder / "conftest.py")
    (folder / "test_marked.py").write_text(MARKED_TEST)
    env = {k: v for k, v in os.environ.items() if k != "STAGEFRONT_REQUIRE_NGSPICE"}
    env[ngspice.ENV_EXECUTABLE] = str(tmp_path / "no-such-ngspice")
    if require:
        env["STAGEFRONT_REQUIRE_NGSPICE"] = "1"
    return subprocess.Popen(
        [sys.executable, "-m", "pytest", "-q", "-rA", "-p", "no:cacheprovider", "-p", "no:hypothesispytest", str(folder)],
        cwd=folder, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )


@pytest.fixture(scope="module")
def policy_runs(tmp_path_factory):
    """Both child pytest runs, started together (each takes about a second)."""
    tmp = tmp_path_factory.mktemp("policy")
    procs = {"optional": _child_pytest(tmp, False), "required": _child_pytest(tmp, True)}
    return {k: (p.communicate(timeout=120)[0], p.returncode) for k, p in procs.items()}


def test_marker_policy_skips_without_ngspice(policy_runs):
    out, returncode = policy_runs["optional"]
    assert returncode == 0 and "1 skipped" in out, out


def test_marker_policy_fails_without_ngspice_when_required(policy_runs):
    out, returncode = policy_runs["required"]
    assert returncode == 1 and "1 failed" in out and "STAGEFRONT_REQUIRE_NGSPICE=1" in out, out
