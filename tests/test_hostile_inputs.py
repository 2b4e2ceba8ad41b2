"""Inputs a careful tester (or a colleague's edited run folder) hands in: every command ends
with a clear error and a non-zero exit, never a traceback, and never silently accepts a
negative, not-a-number or wrongly scaled value. Also `$` in names reaching matplotlib."""
from __future__ import annotations

import os
import re
import shutil
from pathlib import Path

import pytest

from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.inputs import MAX_TEXT_BYTES, read_input
from optimise.search.frontfile import read_front_checked
from optimise.search.runfolder import load_run
from test_search import tiny_study

ROOT = Path(__file__).resolve().parent.parent
CARD = ROOT / "studies" / "models" / "demo180-bsim3-invented.lib"
DESIGN = """architecture = "fixed-bias"
[devices.mn_out]
w = 60
l = 0.7
[devices.mp_out]
w = 150
l = 0.7
[bias]
ib = "4u"
r_bias = "100k"
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """A small run folder with a few floating-loop rows (population 12 x 4 generations)."""
    tmp = tmp_path_factory.mktemp("hostile")
    study = tiny_study(tmp, population=12, generations=4)
    out = tmp / "run"
    assert main(["optimise", str(study), "--out", str(out)]) == 0
    assert len((out / "front.csv").read_text().splitlines()) >= 3, "the fixture needs two rows or more"
    return out


def edited(run: Path, tmp: Path, change, name: str = "edited") -> Path:
    """A copy of the run folder with front.csv's text changed by `change(lines) -> lines`."""
    copy = tmp / name
    shutil.copytree(run, copy)
    lines = (copy / "front.csv").read_text().splitlines()
    (copy / "front.csv").write_text("\n".join(change(lines)) + "\n")
    return copy


def cell(lines, row: int, col: str, value: str):
    """front.csv lines with one cell replaced (row 1 = the first design)."""
    header = lines[0].split(",")
    cells = lines[row].split(",")
    cells[header.index(col)] = value
    return lines[:row] + [",".join(cells)] + lines[row + 1:]


def fifo(tmp: Path) -> Path:
    path = tmp / "pipe.toml"
    if not path.exists():
        os.mkfifo(path)
    return path


def huge(tmp: Path) -> Path:
    path = tmp / "huge.toml"
    with open(path, "wb") as fh:  # sparse: no disk used
        fh.truncate(MAX_TEXT_BYTES + 1)
    return path


def study_with(tmp: Path, old: str, new: str) -> Path:
    path = tiny_study(tmp)
    text = path.read_text()
    assert re.search(old, text), old
    path.write_text(re.sub(old, lambda m: new, text, count=1))
    return path


def design(tmp: Path, text: str = DESIGN) -> Path:
    path = tmp / "design.toml"
    path.write_text(text)
    return path


# Each case: (name, argv builder (run, tmp) -> list, words the message must hold).
CASES = [
    ("negative seed", lambda r, t: ["optimise", str(tiny_study(t)), "--seed", "-1", "--out", str(t / "o")],
     ["--seed"]),
    ("--out names a file", lambda r, t: ["optimise", str(tiny_study(t)), "--out", str(r / "front.csv")],
     ["not a folder"]),
    ("--out under a file", lambda r, t: ["optimise", str(tiny_study(t)), "--out", str(r / "front.csv" / "x")],
     ["is a file, not a folder"]),
    ("calibrate name with a quote", lambda r, t: ["calibrate", "--models", str(CARD), "--out", str(t / "c.toml"),
                                                  "--lmin", "0.18u", "--name", 'a"b'], ["--name"]),
    ("infinite bound", lambda r, t: ["optimise", str(study_with(t, r"mn_out = \{ w = \[[^\]]*\]",
                                                                "mn_out = { w = [1, inf]")), "--out", str(t / "o")],
     ["finite"]),
    ("FIFO as study", lambda r, t: ["evaluate", str(fifo(t)), "--design", str(design(t))], ["FIFO"]),
    ("/dev/zero as study", lambda r, t: ["evaluate", "/dev/zero", "--design", str(design(t))], ["device"]),
    ("folder as study", lambda r, t: ["evaluate", str(t), "--design", str(design(t))], ["folder"]),
    ("huge study", lambda r, t: ["evaluate", str(huge(t)), "--design", str(design(t))], ["larger than"]),
    ("FIFO as design", lambda r, t: ["evaluate", str(tiny_study(t)), "--design", str(fifo(t))], ["FIFO"]),
    ("/dev/zero as technology", lambda r, t: ["evaluate", str(study_with(t, r'technology = "[^"]*"',
                                                                         'technology = "/dev/zero"')),
                                              "--design", str(design(t))], ["device"]),
    ("FIFO as grid", lambda r, t: ["sweep", str(fifo(t)), "--out", str(t / "sw")], ["FIFO"]),
    ("huge --montecarlo", lambda r, t: ["evaluate", str(tiny_study(t)), "--design", str(design(t)),
                                        "--montecarlo", str(10 ** 12)], ["--montecarlo"]),
    ("/dev/zero as model card", lambda r, t: ["netlist", str(r), "--row", "fl-001", "--models", "/dev/zero"],
     ["device"]),
    ("nch declared PMOS", lambda r, t: ["netlist", str(r), "--row", "fl-001", "--models", str(swapped(t))],
     ["declared PMOS"]),
    ("nch declared PMOS in verify", lambda r, t: ["verify", str(r), "--models", str(swapped(t))],
     ["'nch' (--nmos) is declared PMOS"]),
    ("FIFO as model card in verify", lambda r, t: ["verify", str(r), "--models", str(fifo(t))], ["FIFO"]),
    ("netlist --out a folder", lambda r, t: ["netlist", str(r), "--row", "fl-001", "--out", str(t)], ["folder"]),
    ("report --out under a file", lambda r, t: ["report", str(r), "--out", str(r / "front.csv" / "r.html")],
     ["not a folder"]),
    ("negative size in netlist", lambda r, t: ["netlist", str(edited(r, t, lambda x: cell(x, 1, "mn_out_w_um", "-5"))),
                                               "--row", "fl-001"], ["line 2", "fl-001", "mn_out_w_um"]),
    ("nan size in report", lambda r, t: ["report", str(edited(r, t, lambda x: cell(x, 1, "mp_out_l_um", "nan")))],
     ["mp_out_l_um", "finite"]),
    ("width in metres", lambda r, t: ["pick", str(edited(r, t, lambda x: cell(x, 1, "mn_out_w_um", "6e-05")))],
     ["mn_out_w_um", "micrometres"]),
    ("current in microamperes", lambda r, t: ["pick", str(edited(r, t, lambda x: cell(x, 2, "ib_n_a", "4")))],
     ["line 3", "ib_n_a"]),
    ("unknown architecture in verify", lambda r, t: ["verify", str(edited(r, t, lambda x: cell(x, 1, "architecture",
                                                                                             "class-d")))],
     ["class-d", "architecture"]),
    ("duplicate ids in netlist", lambda r, t: ["netlist", str(edited(r, t, lambda x: cell(x, 2, "id", "fl-001"))),
                                               "--row", "fl-001"], ["fl-001", "also on line 2"]),
    ("inf metric in compare", lambda r, t: ["compare", str(r), str(edited(r, t, lambda x: cell(x, 1, "power_w",
                                                                                              "inf")))],
     ["power_w", "finite"]),
    ("nan margin in pick", lambda r, t: ["pick", str(edited(r, t, lambda x: cell(
        x, 1, next(c for c in x[0].split(",") if c.startswith("margin_")), "nan")))], ["margin_", "finite"]),
    ("negative Iq metric", lambda r, t: ["pick", str(edited(r, t, lambda x: cell(x, 1, "iq_a", "-1e-6")))],
     ["iq_a", "negative"]),
    ("bad bulk tie", lambda r, t: ["netlist", str(edited(r, t, lambda x: cell(x, 1, "mn_d1_bulk", "well"))),
                                   "--row", "fl-001"], ["mn_d1_bulk", "rail, source"]),
    ("short line", lambda r, t: ["pick", str(edited(r, t, lambda x: x[:1] + [x[1].rsplit(",", 3)[0]] + x[2:]))],
     ["line 2", "cells"]),
    ("run.json seed of the wrong type", lambda r, t: ["report", str(broken_record(r, t, '"seed": "one"'))],
     ["seed"]),
    ("run.json with NaN", lambda r, t: ["pick", str(broken_record(r, t, '"wall_time_s": NaN'))], ["JSON"]),
    ("verify.csv with a nan error", lambda r, t: ["report", str(with_verify(r, t, "nan"))],
     ["verify.csv", "line 2", "error"]),
]


# Counts and ceilings: refused before any work, naming the option or key and the ceiling.
CASES += [
    ("negative seed in evaluate", lambda r, t: ["evaluate", str(tiny_study(t)), "--design", str(design(t)),
                                                "--montecarlo", "10", "--seed", "-3"],
     ["--seed", "-3", "non-negative"]),
    ("huge --population", lambda r, t: ["optimise", str(tiny_study(t)), "--population", str(10 ** 14), "--out",
                                        str(t / "o")], ["--population", "4 to 10000"]),
    ("huge --generations", lambda r, t: ["optimise", str(tiny_study(t)), "--generations", str(10 ** 13), "--out",
                                         str(t / "o")], ["--generations", "1 to 100000"]),
    ("population x generations", lambda r, t: ["optimise", str(tiny_study(t)), "--population", "10000",
                                               "--generations", "100000", "--out", str(t / "o")],
     ["evaluations", "1e+08"]),
    ("huge [search] population", lambda r, t: ["optimise", str(study_with(t, r"population = \d+",
                                                                          "population = 100000000000000"))],
     ["[search] population", "4 to 10000"]),
    ("population x PVT points", lambda r, t: ["optimise", str(study_with(
        t, r"temperatures_c = \[27\]", "temperatures_c = [" + ", ".join(str(x) for x in range(60)) + "]")),
        "--population", "10000", "--generations", "1", "--out", str(t / "o")], ["design-points per generation"]),
    ("huge --montecarlo in sweep", lambda r, t: ["sweep", str(t / "any.toml"), "--montecarlo", str(10 ** 12)],
     ["--montecarlo", "2 to 1000000"]),
    ("huge --workers", lambda r, t: ["sweep", str(t / "any.toml"), "--workers", "100000"], ["--workers", "1 to 64"]),
    ("huge grid [search] population", lambda r, t: ["sweep", str(grid_with(t, "[search]\npopulation = 99999999\n")),
                                                    "--out", str(t / "sw")], ["[search] population", "10000"]),
    ("grid of a million cells", lambda r, t: ["sweep", str(grid_with(t, "", ", ".join(
        f'"{300 + i}u"' for i in range(1000)), ", ".join(f"{i}" for i in range(1000)))), "--out", str(t / "sw")],
     ["1000000 cells", "at most 1000"]),
    ("empty --rows", lambda r, t: ["verify", str(r), "--rows", ",,"], ["--rows", "names no row"]),
    ("--nmos without --models", lambda r, t: ["netlist", str(r), "--row", "fl-001", "--nmos", "nfet"],
     ["--nmos/--pmos", "without --models"]),
    ("empty --out", lambda r, t: ["optimise", str(tiny_study(t)), "--out", ""], ["--out", "is empty"]),
    ("study name of the wrong type", lambda r, t: ["evaluate", str(study_with(t, r'name = "[^"]*"', "name = 5")),
                                                   "--design", str(design(t))], ["name = 5", "string"]),
    ("repeated temperature", lambda r, t: ["evaluate", str(study_with(t, r"temperatures_c = \[27\]",
                                                                      "temperatures_c = [27, 27]")),
                                           "--design", str(design(t))], ["temperatures_c repeats 27"]),
    ("too many PVT points", lambda r, t: ["evaluate", str(study_with(
        t, r"temperatures_c = \[27\]", "temperatures_c = [" + ", ".join(str(x / 10) for x in range(2000)) + "]")),
        "--design", str(design(t))], ["PVT points", "at most 1000"]),
    ("huge iq_sigmas", lambda r, t: ["evaluate", str(study_with(t, r"iq_sigmas = \d+", "iq_sigmas = 1e300")),
                                     "--design", str(design(t))], ["iq_sigmas", "0 to 10"]),
    ("ab_min above 1", lambda r, t: ["evaluate", str(study_with(t, r"ab_min = [0-9.]+", "ab_min = 5")),
                                     "--design", str(design(t))], ["ab_min", "0 to 1"]),
    ("huge bias bound", lambda r, t: ["optimise", str(study_with(t, r'ib = \["0.3u", "10u"\]',
                                                                 'ib = ["0.3u", 1e300]')), "--out", str(t / "o")],
     ["upper bound", "<= 1 A"]),
    ("huge bias in a design", lambda r, t: ["evaluate", str(tiny_study(t)), "--design",
                                            str(design(t, DESIGN.replace('ib = "4u"', "ib = 1e300")))],
     ["[bias] ib", "too large", "<= 1 A"]),
    ("empty checkpoint", lambda r, t: ["optimise", str(tiny_study(t, population=12, generations=4)), "--out",
                                       str(checkpoint_as(r, t, b"")), "--resume"],
     ["floating-loop.npz", "not a readable stagefront checkpoint"]),
    ("checkpoint linked to /dev/zero", lambda r, t: ["optimise", str(tiny_study(t, population=12, generations=4)),
                                                     "--out", str(checkpoint_as(r, t, None)), "--resume"],
     ["floating-loop.npz", "device"]),
    ("calibrate with thousands of lengths", lambda r, t: [
        "calibrate", "--models", str(CARD), "--out", str(t / "c.toml"), "--lmin", "0.18u", "--lengths",
        ",".join(f"{0.18 + i * 1e-3:.3f}u" for i in range(5000))], ["--lengths", "1 to 16"]),
    ("calibrate at a nan temperature", lambda r, t: ["calibrate", "--models", str(CARD), "--out", str(t / "c.toml"),
                                                     "--lmin", "0.18u", "--tables", "--temps", "nan"],
     ["--temps", "finite"]),
    ("calibrate with a negative --lmin", lambda r, t: ["calibrate", "--models", str(CARD), "--out", str(t / "c.toml"),
                                                       "--lmin=-0.18u"], ["--lmin", "10 nm to 100 um"]),
    ("checkpoint record with a huge population", lambda r, t: [
        "optimise", str(tiny_study(t, population=12, generations=4)), "--out",
        str(meta_with(r, t, population=10 ** 12)), "--resume"], ["meta.json", "'population'", "<= 10000"]),
]


def grid_with(tmp: Path, search: str, currents: str = '"300u"', seeds: str = "1") -> Path:
    path = tmp / "grid.toml"
    path.write_text(f'base = "{tiny_study(tmp)}"\n[axes]\narchitecture = ["floating-loop"]\n'
                    f'"load.current" = [{currents}]\nseed = [{seeds}]\n{search}')
    return path


def checkpoint_as(run: Path, tmp: Path, data: bytes | None) -> Path:
    """A copy of the run folder whose first checkpoint holds `data` (None: a link to /dev/zero)."""
    copy = tmp / "ckpt"
    shutil.copytree(run, copy)
    path = copy / "checkpoint" / "floating-loop.npz"
    path.unlink()
    if data is None:
        path.symlink_to("/dev/zero")
    else:
        path.write_bytes(data)
    return copy


def meta_with(run: Path, tmp: Path, **entries) -> Path:
    import json

    copy = tmp / "meta"
    shutil.copytree(run, copy)
    meta = copy / "checkpoint" / "meta.json"
    meta.write_text(json.dumps({**json.loads(meta.read_text()), **entries}))
    return copy


def swapped(tmp: Path) -> Path:
    path = tmp / "swapped.lib"
    path.write_text(re.sub(r"(?m)^\.model nch nmos", ".model nch pmos", CARD.read_text()))
    return path


def broken_record(run: Path, tmp: Path, entry: str) -> Path:
    copy = tmp / "record"
    shutil.copytree(run, copy)
    text = (copy / "run.json").read_text()
    key = entry.split(":")[0]
    text = re.sub(rf'(?m)^ {key}: .*?,$', lambda m: f" {entry},", text, count=1)
    assert entry in text
    (copy / "run.json").write_text(text)
    return copy


def with_verify(run: Path, tmp: Path, error: str) -> Path:
    copy = tmp / "verified"
    shutil.copytree(run, copy)
    (copy / "verify.csv").write_text("id,architecture,corner,temp_c,vdd_v,metric,model,simulator,error,note\n"
                                     f"fl-001,floating-loop,tt,27,3.0,iq_a,1e-05,1.1e-05,{error},\n")
    return copy


@pytest.mark.parametrize("name, argv, words", CASES, ids=[c[0] for c in CASES])
def test_bad_input_ends_in_a_message_not_a_traceback(run, tmp_path, capsys, name, argv, words):
    # An uncaught exception would propagate out of main() (the traceback case): it must not.
    code = main(argv(run, tmp_path))
    err = capsys.readouterr().err
    assert code != 0, name
    assert "Traceback" not in err and err.startswith("stagefront: error: "), err
    for w in words:
        assert w in err, (w, err)


def test_sizes_and_objectives_of_a_valid_front_are_read_exactly(run):
    # The checked reader gives the same numbers as the file's text (shortest round-trip repr).
    table = read_front_checked(run / "front.csv")
    header, first = (run / "front.csv").read_text().splitlines()[:2]
    cells = dict(zip(header.split(","), first.split(",")))
    assert table["mn_out_w_um"].iloc[0] == float(cells["mn_out_w_um"])
    assert table["overall_front"].dtype == bool and table["id"].iloc[0] == cells["id"]
    assert load_run(run).table.shape == table.shape


def test_margin_and_metric_columns_are_checked_by_family_not_by_name(run, tmp_path):
    # A renamed margin column (another unit, say) is checked like any number column:
    # empty is allowed, nan is not.
    def rename(lines, value):
        lines = [ln.replace("margin_area_pct", "margin_area_ppm") for ln in lines]
        return cell(lines, 1, "margin_area_ppm", value)

    ok = edited(run, tmp_path, lambda x: rename(x, ""), "empty")
    assert read_front_checked(ok / "front.csv")["margin_area_ppm"].isna().iloc[0]
    bad = edited(run, tmp_path, lambda x: rename(x, "nan"), "nan")
    with pytest.raises(InputError, match=r"line 2 \(row 'fl-001'\), column margin_area_ppm"):
        read_front_checked(bad / "front.csv")


def test_file_kinds_are_refused_before_reading(tmp_path):
    with pytest.raises(InputError, match="FIFO"):
        read_input(fifo(tmp_path))
    with pytest.raises(InputError, match="device"):
        read_input("/dev/zero")
    with pytest.raises(InputError, match="folder"):
        read_input(tmp_path)
    with pytest.raises(InputError, match="larger than"):
        read_input(huge(tmp_path))
    link = tmp_path / "link.toml"
    link.symlink_to("/dev/zero")
    with pytest.raises(InputError, match="device"):
        read_input(link)


def test_dollar_signs_in_folder_names_and_ids_reach_the_figures(run, tmp_path, capsys):
    # Two $ make matplotlib read the text between them as mathtext; \frac{ without its
    # arguments then fails to parse. Labels must show the text as it is.
    odd = edited(run, tmp_path / "a$x$", lambda x: [ln.replace("fl-001", r"$\frac{1}{$") for ln in x],
                 r"r$\frac{a}{$")
    assert main(["report", str(odd)]) == 0
    assert (odd / "report-fronts.png").stat().st_size > 0 and (odd / "report-mismatch.png").stat().st_size > 0
    assert main(["compare", str(odd), str(run), "--out", str(tmp_path / "cmp")]) == 0
    assert (tmp_path / "cmp" / "compare.png").stat().st_size > 0
    assert "Traceback" not in capsys.readouterr().err


@pytest.mark.parametrize("change, words", [
    (lambda r: r.update(architectures={"class-d": {}}), ["'class-d'", "not an architecture"]),
    (lambda r: r["architectures"]["floating-loop"].update(hypervolume=["0.3", 0.4]), ["hypervolume"]),
    (lambda r: r.update(population=True), ["population"]),
    (lambda r: r.update(generations=-2), ["generations", ">= 0"]),
    (lambda r: r.update(objectives={"power_w": "smallest"}), ["objectives"]),
    (lambda r: r["architectures"]["floating-loop"].update(blocked="no"), ["blocked"]),
])
def test_run_json_types_and_ranges_are_checked(run, change, words):
    import json

    from optimise.search.frontfile import check_run_record

    record = json.loads((run / "run.json").read_text())
    check_run_record(record, "run.json")  # the real one passes
    change(record)
    with pytest.raises(InputError) as err:
        check_run_record(record, "run.json")
    for w in words:
        assert w in str(err.value), str(err.value)


def test_a_checkpoint_record_with_wrong_types_is_refused_on_resume(run, tmp_path, capsys):
    import json

    copy = tmp_path / "resume"
    shutil.copytree(run, copy)
    meta = copy / "checkpoint" / "meta.json"
    record = json.loads(meta.read_text())
    record["population"] = "many"
    meta.write_text(json.dumps(record))
    study = tiny_study(tmp_path, population=8, generations=3)
    assert main(["optimise", str(study), "--out", str(copy), "--resume"]) == 2
    err = capsys.readouterr().err
    assert "meta.json" in err and "'population'" in err and "Traceback" not in err


def test_a_byte_order_mark_at_the_start_of_a_study_is_dropped(tmp_path, capsys):
    # Some editors start UTF-8 files with U+FEFF; TOML does not allow it, so it would be
    # refused as "Invalid statement" at line 1. The text after it is the same study.
    plain = tiny_study(tmp_path)
    marked = tmp_path / "marked.toml"
    marked.write_text("\ufeff" + plain.read_text(), encoding="utf-8")
    assert main(["evaluate", str(plain), "--design", str(design(tmp_path)), "--json"]) == 0
    first = capsys.readouterr().out
    assert main(["evaluate", str(marked), "--design", str(design(tmp_path)), "--json"]) == 0
    assert capsys.readouterr().out == first


def test_ceilings_allow_what_real_studies_use():
    # The ceilings refuse only absurd counts: the demo budgets and the fixture's pass.
    from optimise.files.tables import MAX_EVALUATIONS, MAX_GENERATIONS, MAX_MONTECARLO, MAX_POPULATION

    assert 200 * 500 <= MAX_EVALUATIONS and 500 <= MAX_GENERATIONS and 200 <= MAX_POPULATION
    assert MAX_POPULATION * MAX_GENERATIONS > MAX_EVALUATIONS  # the product check is not redundant
    assert 10_000 <= MAX_MONTECARLO  # "10000 samples give the sigma to about 1 %"
