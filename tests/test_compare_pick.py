"""`stagefront compare` and `stagefront pick`, end to end through optimise.cli.main on a tiny run.

The run is made once per module (population 12, 4 generations: a few seconds) and only its
properties are tested, never exact fronts (STYLE.md 2.6: fronts differ across platforms).
"""
from __future__ import annotations

import io
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from optimise.cli import main
from optimise.review.compare_render import compare_runs
from optimise.review.pick import knee_distance

ROOT = Path(__file__).resolve().parent.parent
STUDY = ROOT / "studies" / "sensor-buffer.toml"


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("runs") / "tiny"
    code = main(["optimise", str(STUDY), "--out", str(out), "--population", "12", "--generations", "4",
                 "--seed", "4"])
    assert code == 0
    front = pd.read_csv(out / "front.csv")
    # Seed 4 finds about a dozen floating-loop designs on this study; fewer than 3 would make
    # the ordering and filtering checks below vacuous, so say so instead of passing quietly.
    assert len(front) >= 3, f"the tiny run found only {len(front)} designs"
    return out


def cli(capsys, *args):
    code = main([str(a) for a in args])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def front_of(run_dir: Path) -> pd.DataFrame:
    return pd.read_csv(run_dir / "front.csv").set_index("id")


def picked(out: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(out))


def worse_copy(run_dir: Path, dest: Path) -> Path:
    """A run folder whose every design is strictly worse in every objective than the
    same design of `run_dir`, so `run_dir` dominates it by construction."""
    shutil.copytree(run_dir, dest)
    table = pd.read_csv(dest / "front.csv")
    for name in ("power_w", "area_um2", "iq_sigma_pct", "supply_sens_pct_per_v"):
        table[name] *= 1.5  # minimised (supply sensitivity in magnitude): 50 % worse
    table["swing_v"] -= 0.1  # maximised: 100 mV less
    table.to_csv(dest / "front.csv", index=False, float_format="%.17g")
    return dest


# ---------------------------------------------------------------------------------- pick

def test_where_keeps_only_rows_within_budget(capsys, run):
    front = front_of(run)
    budget = float(np.median(front["power_w"]))
    text = f"{budget * 1e6:.6g}u"  # engineering suffix at the edge: micro-watts
    # The swing floor at the front's median too, so that each of the two budgets drops rows
    # (a floor below every row's swing would keep them all and check nothing).
    swing = float(f"{float(np.median(front['swing_v'])):.6g}")
    code, out, _ = cli(capsys, "pick", run, "--where", f"power_w<={text}", "--where", f"swing_v>={swing!r}",
                       "--count", "1000", "--format", "csv")
    assert code == 0
    rows = picked(out)
    limit = float(f"{budget * 1e6:.6g}") * 1e-6
    assert (front["power_w"] > limit).any() and (front["swing_v"] < swing).any()  # each budget bites
    for design in rows["id"]:
        assert front.loc[design, "power_w"] <= limit
        assert front.loc[design, "swing_v"] >= swing
    # and nothing that meets both budgets was left out
    expected = front[(front["power_w"] <= limit) & (front["swing_v"] >= swing)]
    assert sorted(rows["id"]) == sorted(expected.index)


def test_where_on_margin_in_percent(capsys, run):
    code, out, _ = cli(capsys, "pick", run, "--where", "margin_headroom_pct>=10%", "--count", "1000", "--format",
                       "csv")
    front = front_of(run)
    if code == 1:  # no design has 10 % headroom margin left: nothing printed
        assert (front["margin_headroom_pct"] < 10).all()
        return
    rows = picked(out)
    assert (front.loc[rows["id"], "margin_headroom_pct"] >= 10).all()
    # one unit everywhere: the CSV's margin is front.csv's, in percent
    assert np.array_equal(rows["margin_headroom_pct"], front.loc[rows["id"], "margin_headroom_pct"])
    # and the compact table shows the same percent (to its 3 digits)
    code, text, _ = cli(capsys, "pick", run, "--by", "power_w", "--count", "1")
    top = front["power_w"].idxmin()
    shown = re.escape(f"{front.loc[top, 'margin_headroom_pct']:.3g}")
    assert re.search(r"\|\s+" + shown + r" \|", text)


@pytest.mark.parametrize("objective, sense", [("power_w", "min"), ("area_um2", "min"), ("swing_v", "max")])
def test_by_objective_orders_in_its_sense(capsys, run, objective, sense):
    code, out, _ = cli(capsys, "pick", run, "--by", objective, "--count", "1000", "--format", "csv")
    assert code == 0
    values = front_of(run).loc[picked(out)["id"], objective].to_numpy()
    steps = np.diff(values)
    assert (steps >= 0).all() if sense == "min" else (steps <= 0).all()
    assert len(values) == len(front_of(run))


def test_pick_units_at_the_edge(capsys, run):
    code, out, _ = cli(capsys, "pick", run, "--by", "power_w", "--count", "1", "--format", "csv")
    row = picked(out).iloc[0]
    design = front_of(run).loc[row["id"]]
    # the CSV is front.csv's row as it is: contract names, SI units (sizes in um), exact numbers
    assert row["mn_out_w_um"] == design["mn_out_w_um"]
    assert row["ib_ctl_a"] == design["ib_ctl_a"]
    assert row["iq_a"] == design["iq_a"] and row["rank"] == 1
    # the compact table shows them in uA, with the unit once in the header
    code, text, _ = cli(capsys, "pick", run, "--by", "power_w", "--count", "1")
    assert "ib_ctl [uA]" in text and f"{design['ib_ctl_a'] * 1e6:.5g}" in text
    assert "Iq [uA]" in text and f"{design['iq_a'] * 1e6:.4g}" in text


def test_knee_pick_is_a_non_dominated_front_member(capsys, run):
    code, out, _ = cli(capsys, "pick", run, "--count", "1", "--format", "csv")
    assert code == 0
    front = front_of(run)
    top = picked(out)["id"].iloc[0]
    assert top in front.index
    assert bool(front.loc[top, "overall_front"])
    # the knee as defined in optimise.review.pick.knee_distance, recomputed here by hand:
    # objectives as minimised, scaled to the front's own [min, max], smallest largest coordinate
    run_json = json.loads((run / "run.json").read_text())
    F = np.stack([(-1 if s == "max" else 1) * np.abs(front[n].to_numpy()) if n == "supply_sens_pct_per_v"
                  else (-1 if s == "max" else 1) * front[n].to_numpy() for n, s in run_json["objectives"].items()],
                 axis=1)
    span = np.where(F.max(0) > F.min(0), F.max(0) - F.min(0), 1.0)
    cheb = ((F - F.min(0)) / span).max(axis=1)
    assert cheb[list(front.index).index(top)] == pytest.approx(cheb.min(), rel=1e-12)


def test_knee_of_a_hand_made_front():
    # Hand calculation (common practice, no source): on the front (0, 1), (0.4, 0.4), (1, 0)
    # the box is already [0, 1]^2; the largest coordinates are 1, 0.4, 1, so the middle
    # design is the knee, 0.4 from the ideal point in the Chebyshev distance.
    cheb, eucl = knee_distance(np.array([[0.0, 1.0], [0.4, 0.4], [1.0, 0.0]]))
    assert np.argmin(cheb) == 1
    assert cheb[1] == pytest.approx(0.4, rel=1e-12)
    assert eucl[1] == pytest.approx(0.4 * np.sqrt(2), rel=1e-12)
    # A front on which the Chebyshev knee and the Euclidean one differ: largest coordinates
    # 1, 0.45, 0.6 (Chebyshev picks the middle one), distances 1, 0.636, 0.608 (Euclid the last).
    cheb3, eucl3 = knee_distance(np.array([[0.0, 1.0], [0.45, 0.45], [0.1, 0.6], [1.0, 0.0]]))
    assert np.argmin(cheb3) == 1 and np.argmin(eucl3) == 2
    # scale-free: the same front in W and V picks the same design
    cheb2, _ = knee_distance(np.array([[0.0, 3.3], [4e-5, 1.32], [1e-4, 0.0]]))
    assert np.argmin(cheb2) == 1


def test_markdown_tables_have_units_and_fit_100_columns(capsys, run):
    code, out, _ = cli(capsys, "pick", run, "--count", "2")
    assert code == 0
    headers = " ".join(ln for ln in out.splitlines() if ln.startswith("| #") or ln.startswith("| id"))
    for col in ("mn_out W/L [um]", "ib_ctl [uA]", "power typ [uW]", "power max [uW]", "headroom [%]",
                "knee dist", "peak out [mA]"):
        assert col in headers, col
    # no column name doubled with its unit, as "power_w [uW]" once was
    assert "power_w [" not in out
    tables = [ln for ln in out.splitlines() if ln.startswith("|")]
    # a 100-column terminal shows every table line whole
    assert max(len(ln) for ln in tables) <= 100
    # tied devices share one column: the floating loop's three matched N devices are one
    assert "mn_d1+2 W/L [um]" in headers and "mn_d2 W/L" not in headers
    assert "mn_d1+2 = mn_d1, mn_d2, mn_ctl" in out
    # every design appears once per table part
    assert len([ln for ln in tables if ln.startswith("| 1 ") or ln.startswith("| 2 ")]) % 2 == 0
    code, wide, _ = cli(capsys, "pick", run, "--count", "2", "--wide")
    assert max(len(ln) for ln in wide.splitlines() if ln.startswith("|")) > 100  # one row per design
    assert len([ln for ln in wide.splitlines() if ln.startswith("| 1 ") or ln.startswith("| 2 ")]) == 2


def test_pick_and_report_name_the_same_knee_whatever_the_budgets(capsys, run):
    from optimise.report.data import pick_rows
    from optimise.search.runfolder import load_run

    r = load_run(run)
    report_knee = pick_rows(r.table, r.objectives, 1)["id"].iloc[0]
    code, out, _ = cli(capsys, "pick", run, "--count", "1", "--format", "csv")
    assert picked(out)["id"].iloc[0] == report_knee
    # a budget that keeps the knee keeps it on top: the box is always the whole front's
    budget = float(r.table.set_index("id").loc[report_knee, "power_w"])
    code, out, err = cli(capsys, "pick", run, "--count", "1", "--format", "csv", "--where",
                         f"power_w<={budget * 1e6 * (1 + 1e-9):.12g}u")
    assert picked(out)["id"].iloc[0] == report_knee
    if (r.table["power_w"] > budget * (1 + 1e-9)).any():
        assert f"the run's knee {report_knee} meets the budgets" in err


@pytest.mark.parametrize("budget, words", [
    ("power_w=200u", ["'='", "<=, >=, <, >, ==", "'=='"]),
    ("power_w=<200u", ["'=<'", "'<='"]),
    ("power_w!=200u", ["'!='", "<=, >=, <, >, =="]),
    ("power_w 200u", ["no comparison operator", "<=, >=, <, >, =="]),
    ("pwer_w<=200u", ["'pwer_w' is not a column", "swing_v", "margin_headroom", "did you mean 'power_w'"]),
    ("power_w<=", ["no value"]),
    ("power_w<=200uA", ["'uA'", "'W'"]),
    ("area_um2<=100u", ["plain number in um^2"]),
    ("architecture<=x", ["only =="]),
])
def test_bad_where_is_an_input_error(capsys, run, budget, words):
    code, out, err = cli(capsys, "pick", run, "--where", budget)
    assert code == 2 and out == ""
    assert err.startswith("stagefront: error: --where")
    for w in words:
        assert w in err, (w, err)


def test_bad_by_and_count(capsys, run):
    code, _, err = cli(capsys, "pick", run, "--by", "iq_a")
    assert code == 2 and "knee, power_w, swing_v" in err and "--where" in err
    code, _, err = cli(capsys, "pick", run, "--count", "0")
    assert code == 2 and "--count" in err


def test_empty_result_names_the_budget_that_removed_the_last_rows(capsys, run):
    code, out, err = cli(capsys, "pick", run, "--where", "power_w<=1", "--where", "swing_v>=100",
                         "--where", "area_um2<=1e9")
    assert code == 1 and out == ""
    assert "'power_w<=1'" in err and "'swing_v>=100': " in err
    line = next(ln for ln in err.splitlines() if "'swing_v>=100'" in ln)
    assert "removed the last designs" in line and " -> 0" in line
    assert "largest swing_v among them" in err
    assert "area_um2" not in err  # never reached


def test_pick_refuses_a_folder_that_is_not_a_run(capsys, tmp_path):
    code, _, err = cli(capsys, "pick", tmp_path)
    assert code == 2 and "has no front.csv" in err


# ------------------------------------------------------------------------------- compare

def shaken_copy(run_dir: Path, dest: Path) -> Path:
    """A run folder whose designs are the run's with every objective moved by up to
    +-10 % (swing +-50 mV), seeded: some designs of each dominate some of the other."""
    shutil.copytree(run_dir, dest)
    table = pd.read_csv(dest / "front.csv")
    rng = np.random.default_rng(7)
    for name in ("power_w", "area_um2", "iq_sigma_pct", "supply_sens_pct_per_v"):
        table[name] *= rng.uniform(0.9, 1.1, len(table))
    table["swing_v"] += rng.uniform(-0.05, 0.05, len(table))
    table.to_csv(dest / "front.csv", index=False, float_format="%.17g")
    return dest


@pytest.fixture(scope="module")
def compared(run, tmp_path_factory):
    """compare on the tiny run, a strictly worse copy and a shaken copy, written to --out."""
    base = tmp_path_factory.mktemp("compare")
    worse, shaken = worse_copy(run, base / "worse"), shaken_copy(run, base / "shaken")
    out_dir = base / "cmp"
    stdout = io.StringIO()
    assert compare_runs([run, worse, shaken], out_dir, stream=stdout) == 0
    return {"tiny": run, "worse": worse, "shaken": shaken}, out_dir, stdout.getvalue()


def test_compare_cli_writes_its_files(capsys, run, compared):
    code, out, _ = cli(capsys, "compare", run, compared[0]["worse"])
    assert code == 0 and "tiny/floating-loop dominates" in out
    for name in ("compare.csv", "compare.md", "compare.png"):
        assert (compared[1] / name).stat().st_size > 0


def test_compare_flags_the_run_that_dominates(compared):
    folders, out_dir, out = compared
    pairs = pd.read_csv(out_dir / "compare.csv")
    fl = pairs[pairs["run_a"].isin(["tiny", "worse"]) & pairs["run_b"].isin(["tiny", "worse"])
               & (pairs["architecture_a"] == "floating-loop") & (pairs["architecture_b"] == "floating-loop")]
    assert len(fl) == 1
    p = fl.iloc[0]
    share_worse = p["share_a_dominated_by_b"] if p["run_a"] == "worse" else p["share_b_dominated_by_a"]
    share_tiny = p["share_b_dominated_by_a"] if p["run_a"] == "worse" else p["share_a_dominated_by_b"]
    assert share_worse == 1.0 and share_tiny == 0.0
    assert p["verdict"] == ("b dominates" if p["run_a"] == "worse" else "a dominates")
    assert "tiny/floating-loop dominates" in out
    assert "tiny/floating-loop dominates" in (out_dir / "compare.md").read_text()
    # architectures with no feasible design are named, not compared
    assert "tiny/fixed-bias: no feasible design" in out


def test_compare_shares_match_a_direct_count(compared):
    folders, out_dir, _ = compared
    pairs = pd.read_csv(out_dir / "compare.csv")
    assert len(pairs) == 3  # three runs, one architecture with designs each
    objectives = json.loads((folders["tiny"] / "run.json").read_text())["objectives"]

    def F(folder, arch):
        t = pd.read_csv(folder / "front.csv")
        t = t[t["architecture"] == arch]
        return np.stack([(-t[n] if s == "max" else t[n].abs() if n == "supply_sens_pct_per_v" else t[n]).to_numpy()
                         for n, s in objectives.items()], axis=1)

    for p in pairs.itertuples():
        A, B = F(folders[p.run_a], p.architecture_a), F(folders[p.run_b], p.architecture_b)
        for X, Y, share in ((A, B, p.share_a_dominated_by_b), (B, A, p.share_b_dominated_by_a)):
            count = sum(any(np.all(y <= x) and np.any(y < x) for y in Y) for x in X)
            assert share == pytest.approx(count / len(X), rel=1e-12)
    # the shaken copy is neither better nor worse throughout: at least one share is partial
    shaken = pairs[(pairs["run_a"] == "shaken") | (pairs["run_b"] == "shaken")]
    shares = np.concatenate([shaken["share_a_dominated_by_b"], shaken["share_b_dominated_by_a"]])
    assert ((shares > 0) & (shares < 1)).any()


def test_compare_refuses_runs_with_different_objectives(capsys, run, tmp_path):
    other = tmp_path / "fewer"
    shutil.copytree(run, other)
    record = json.loads((other / "run.json").read_text())
    record["objectives"] = {"power_w": "min", "swing_v": "max"}
    (other / "run.json").write_text(json.dumps(record))
    code, out, err = cli(capsys, "compare", run, other)
    assert code == 2 and out == ""
    assert str(run) in err and str(other) in err
    assert "power_w (min), swing_v (max)]" in err and "supply_sens_pct_per_v (min)" in err


def test_compare_out_folder_not_overwritten_without_consent(capsys, run, compared):
    out_dir = compared[1]
    (out_dir / "notes.txt").write_text("mine")
    before = (out_dir / "compare.csv").read_text()
    code, _, err = cli(capsys, "compare", run, "--out", out_dir)
    assert code == 2 and "not empty" in err and "--overwrite" in err
    assert (out_dir / "compare.csv").read_text() == before
    code, _, _ = cli(capsys, "compare", run, "--out", out_dir, "--overwrite")
    assert code == 0
    assert (out_dir / "notes.txt").read_text() == "mine"  # only the compare files are replaced
    assert (out_dir / "compare.csv").read_text() != before  # one run now: no pairs left
    code, _, err = cli(capsys, "compare", run, "--out", run)
    assert code == 2 and "one of the run folders" in err


def test_compact_pick_shows_the_amplifier_columns_of_front_csv(capsys, run):
    # The demo describes its amplifier: the compact table carries the worst-case unity gain,
    # phase margin, slew rate and gate time, each the front.csv value in the header's unit.
    front = front_of(run)
    assert {"ugf_hz", "phase_margin_deg", "slew_v_per_s", "gate_time_s"} <= set(front.columns)
    code, out, _ = cli(capsys, "pick", run, "--count", "3")
    assert code == 0
    lines = out.splitlines()
    for header, factor, name in (("UGF [MHz]", 1e-6, "ugf_hz"), ("PM [deg]", 1.0, "phase_margin_deg"),
                                 ("slew [V/us]", 1e-6, "slew_v_per_s"), ("gate time [us]", 1e6, "gate_time_s")):
        at = next(n for n, ln in enumerate(lines) if header in ln)
        k = [c.strip() for c in lines[at].strip("|").split("|")].index(header)
        for row in lines[at + 2:at + 5]:  # below the header and its rule: the 3 designs picked
            cells = [c.strip() for c in row.strip("|").split("|")]
            rid = next(c for c in cells if c.startswith("fl-")).rstrip("°")
            want = float(front.loc[rid, name]) * factor
            assert float(cells[k]) == pytest.approx(want, rel=5e-4), (header, rid)  # 4 digits shown
