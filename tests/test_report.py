"""`stagefront report`: every section in both renderings, numbers that are evaluate()'s,
the caution, a page with no outside resource, the verification table and refusals."""
from __future__ import annotations

import base64
import json
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from models.devices.constants import ZERO_CELSIUS
from models.evaluate import evaluate
from optimise.cli import main
from optimise.files.errors import InputError
from optimise.files.study import load_study
from optimise.report.build import CAUTION, CLOSE, SECTIONS, TIGHT, write_report
from optimise.review.pick import rank
from optimise.search.export import design_from_row, read_front

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "studies" / "sensor-buffer.toml"


def make_run(tmp: Path) -> Path:
    """A tiny run folder: the demo study cut to tt and ss at 27 C, population 16 x 6 generations (enough for
    several feasible designs under the amplifier's phase-margin target)."""
    text = DEMO.read_text().replace('"tech/', f'"{ROOT / "studies" / "tech"}/')
    text = text.replace("temperatures_c = [27, -40, 125]", "temperatures_c = [27]")
    text = text.replace('corners = ["tt", "ff", "ss", "fs", "sf"]', 'corners = ["tt", "ss"]')
    study = tmp / "tiny.toml"
    study.write_text(text)
    out = tmp / "run"
    assert main(["optimise", str(study), "--out", str(out), "--population", "16", "--generations", "6"]) == 0
    return out


class Tables(HTMLParser):
    """Every table of a page by id: header keys, header labels and rows of (text, data-sort, class)."""

    def __init__(self):
        super().__init__()
        self.tables, self._cur, self._cell, self._attrs = {}, None, None, {}

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "table":
            self._cur = self.tables.setdefault(a.get("id"), {"keys": [], "labels": [], "rows": []})
        elif tag == "tr" and self._cur is not None:
            self._row = []
        elif tag in ("th", "td") and self._cur is not None:
            self._cell, self._attrs = [], a

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)

    def handle_endtag(self, tag):
        if tag == "table":
            self._cur = None
        elif tag == "th" and self._cell is not None:
            self._cur["keys"].append(self._attrs.get("data-key"))
            self._cur["labels"].append("".join(self._cell))
            self._cell = None
        elif tag == "td" and self._cell is not None:
            self._row.append(("".join(self._cell), self._attrs.get("data-sort"), self._attrs.get("class") or ""))
            self._cell = None
        elif tag == "tr" and self._cur is not None and self._row:
            self._cur["rows"].append(self._row)


def tables_of(page: str) -> dict:
    p = Tables()
    p.feed(page)
    return p.tables


def column(table: dict, key: str) -> list:
    k = table["keys"].index(key)
    return [row[k] for row in table["rows"]]


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    run = make_run(tmp_path_factory.mktemp("report"))
    assert main(["report", str(run)]) == 0
    return run, (run / "report.html").read_text(), (run / "report.md").read_text()


def test_every_section_is_in_both_renderings(report):
    _, page, md = report
    for key, title in SECTIONS:
        assert f'<section id="{key}"><h2>{title}</h2>' in page, title
        assert f"\n## {title}\n" in md, title
    # Same order in both.
    assert [md.index(f"## {t}\n") for _, t in SECTIONS] == sorted(md.index(f"## {t}\n") for _, t in SECTIONS)


def test_caution_is_prominent_in_both(report):
    _, page, md = report
    # optimise.CAUTION: the caution the report repeats, word for word in substance.
    assert "model estimates for early design" in CAUTION.lower() and "never tape out" in CAUTION.lower()
    assert f'<p class="caution">{CAUTION.replace(chr(39), "&#x27;")}</p>' in page
    assert page.index('class="caution"') < page.index("<h2>At a glance</h2>")
    assert f"> **{CAUTION}**" in md and md.index(CAUTION) < md.index("## At a glance")


def test_page_needs_no_outside_resource(report):
    _, page, _ = report
    assert not re.search(r"https?:", page, flags=re.I)
    assert not re.search(r"""(?:src|href)\s*=\s*["']?//""", page, flags=re.I)
    srcs = re.findall(r'<img[^>]*\ssrc="([^"]*)"', page)
    assert len(srcs) == 5  # fronts, parallel coordinates, the knee's loop gain (the demo has an amplifier), mismatch, supply
    for src in srcs:
        head, data = src.split(",", 1)
        assert head == "data:image/png;base64"
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"
    assert "<script>" in page and "<style>" in page and "<script src" not in page and "<link" not in page


def test_markdown_figures_are_written_beside_it(report):
    run, _, md = report
    names = re.findall(r"!\[[^\]]*\]\(([^)]+)\)", md)
    assert names == ["report-fronts.png", "report-parallel.png", "report-bode.png", "report-mismatch.png",
                     "report-supply.png"]
    for name in names:
        assert (run / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_knee_and_its_numbers_are_evaluates(report):
    run, page, md = report
    table = read_front(run / "front.csv")
    study = load_study(run.parent / "tiny.toml")
    objectives = {"power_w": "min", "swing_v": "max", "area_um2": "min", "iq_sigma_pct": "min",
                  "supply_sens_pct_per_v": "min"}
    knee_id = rank(table, objectives, "knee")["id"].iloc[0]
    picked = tables_of(page)["picked"]
    assert column(picked, "id")[0][0] == knee_id
    assert column(picked, "pick")[0][0].startswith("knee")
    res = evaluate(design_from_row(table[table["id"] == knee_id].iloc[0]), study.tech, study.conditions,
                   study.targets)
    iq_text = f"{res.summary['iq_a'][0] * 1e6:.4g}"
    assert column(picked, "iq_a")[0][0] == iq_text
    assert re.search(rf"\| {knee_id} \|.*\| +{re.escape(iq_text)} \|", md)
    # Per-corner table: every PVT point (2 corners x 1 temperature x 3 supplies), in evaluate's order.
    pvt = tables_of(page)["knee-pvt"]
    assert len(pvt["rows"]) == 6
    assert [c[0] for c in column(pvt, "iq_a")] == [f"{v * 1e6:.4g}" for v in res.pvt["iq_a"][0]]
    assert [c[0] for c in column(pvt, "iq_sigma_pct")] == [f"{v:.4g}" for v in res.pvt["iq_sigma_pct"][0]]
    assert [c[0] for c in column(pvt, "temp_c")] == [f"{t - ZERO_CELSIUS:.4g}" for t in res.temps]
    # Supply table: the knee's Iq at the nominal supply (tt, 27 C) is the summary's nominal Iq.
    supply = tables_of(page)["supply-table"]
    assert column(supply, "nom")[0][0] == iq_text


def test_margins_are_coloured_by_closeness_to_their_limit(report):
    run, page, md = report
    picked = tables_of(page)["picked"]
    keys = [k for k in picked["keys"] if k.startswith("margin_")]
    assert keys
    for k in keys:
        for text, sort, cls in column(picked, k):
            m = float(sort) / 100
            want = "tight" if m < TIGHT else "close" if m < CLOSE else "ample"
            assert want in cls.split(), (k, text, cls)
    assert 'class="legend"' in page and "Margins: `!!`" in md


def test_picked_are_knee_then_best_per_objective(report, tmp_path):
    run, page, _ = report
    picks = [c[0] for c in column(tables_of(page)["picked"], "pick")]
    assert picks[0].startswith("knee")
    named = " ".join(picks)
    for what in ("power", "swing", "area", "Iq sigma", "supply sens."):
        assert f"best {what}" in named
    out = tmp_path / "two" / "lead.html"
    assert write_report(run, out, count=2, stream=open("/dev/null", "w")) == 0
    assert len(tables_of(out.read_text())["picked"]["rows"]) == 2
    assert (out.parent / "lead.md").is_file() and (out.parent / "lead-supply.png").is_file()


def test_verification_table_with_loosely_named_columns(report, tmp_path):
    run, page, md = report
    assert "Verification has not been run" in page and "Verification has not been run" in md
    copy = tmp_path / "run"
    copy.mkdir()
    for name in ("front.csv", "run.json"):
        shutil.copy(run / name, copy / name)
    knee = column(tables_of(page)["picked"], "id")[0][0]
    (copy / "verify.csv").write_text(
        "ID,Corner,Temp C,VDD,Metric,Model,Simulator,Rel Error\n"
        f"{knee},tt,27,3.3,iq_a,1.1e-05,1.1011e-05,-0.001\n"
        f"{knee},ss,27,2.7,headroom_high_v,0.158,0.1585,-0.0005\n")
    write_report(copy, stream=open("/dev/null", "w"))
    page2, md2 = (copy / "report.html").read_text(), (copy / "report.md").read_text()
    ver = tables_of(page2)["verification"]
    assert ver["keys"] == ["id", "corner", "temp_c", "vdd_v", "metric", "model", "simulator", "error"]
    assert [c[0] for c in column(ver, "error")] == ["-0.1 %", "-0.5 mV"]
    assert column(ver, "model")[0][0] == "11 uA"
    summary = tables_of(page2)["verification-summary"]
    assert [c[0] for c in column(summary, "metric")] == ["iq_a", "iq_a", "headroom_high_v", "headroom_high_v"]
    assert [c[0] for c in column(summary, "corner")] == ["all", "tt", "all", "ss"]
    assert [c[0] for c in column(summary, "worst")] == ["-0.1 %", "-0.1 %", "-0.5 mV", "-0.5 mV"]
    assert "Verification has not been run" not in page2 and "| -0.5 mV |" in md2


def test_bad_run_folders_are_refused(tmp_path, report, capsys):
    with pytest.raises(InputError, match="not a run folder"):
        write_report(tmp_path / "nowhere")
    half = tmp_path / "half"
    half.mkdir()
    shutil.copy(report[0] / "front.csv", half / "front.csv")
    with pytest.raises(InputError, match="has no run.json"):
        write_report(half)
    assert main(["report", str(half)]) == 2
    assert "has no run.json" in capsys.readouterr().err
    assert main(["report", str(report[0]), "--out", str(tmp_path / "r.txt")]) == 2
    assert main(["report", str(report[0]), "--count", "0"]) == 2


def test_a_run_without_feasible_designs_still_reports(report, tmp_path):
    run = tmp_path / "empty"
    run.mkdir()
    shutil.copy(report[0] / "run.json", run / "run.json")
    (run / "front.csv").write_text((report[0] / "front.csv").read_text().splitlines()[0] + "\n")
    write_report(run, stream=open("/dev/null", "w"))
    page, md = (run / "report.html").read_text(), (run / "report.md").read_text()
    for _, title in SECTIONS:
        assert f"## {title}\n" in md
    assert "No Pareto design in front.csv." in md and "<img" not in page and CAUTION in md


def test_sort_keys_are_numbers_where_the_column_is_numeric(report):
    # The page's sorting script reads data-sort; numeric columns must carry plain numbers.
    picked = tables_of(report[1])["picked"]
    for key in ("iq_a", "power_w", "swing_v", "knee_distance"):
        values = [float(s) for _, s, _ in column(picked, key)]
        assert np.all(np.isfinite(values))


def test_verification_of_an_ekv_study_against_level1_cards_says_so_beside_the_figures(report, tmp_path):
    run, _, _ = report
    copy = tmp_path / "run"
    copy.mkdir()
    for name in ("front.csv", "run.json"):
        shutil.copy(run / name, copy / name)
    knee = pd.read_csv(run / "front.csv")["id"].iloc[0]
    (copy / "verify.csv").write_text("id,corner,temp_c,vdd_v,metric,model,simulator,error,error_unit,note\n"
                                     f"{knee},tt,27,3.3,iq_a,1.1e-05,1.3e-05,0.18,rel,\n")
    caveat = ("the level-1 cards made from it run the square law, so these errors compare two device models "
              "(EKV against level 1)")
    (copy / "verify.json").write_text(json.dumps({"models": None, "caveat": "note: demo is an ekv technology; "
                                                  + caveat}))
    write_report(copy, stream=open("/dev/null", "w"))
    md = (copy / "report.md").read_text()
    section = md.split("## Verification against a simulator", 1)[1].split("\n## ", 1)[0]
    assert caveat in section and "| iq_a " in section
    assert caveat in md.split("## At a glance", 1)[1].split("\n## ", 1)[0]
