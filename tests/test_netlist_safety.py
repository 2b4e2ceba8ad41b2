"""What reaches a SPICE deck from other people's files runs nothing: names with line breaks
stay inside comments, model names must be plain, and a model card holding a .control block
or a shell command is refused unless --trust-card is given."""
from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

import pytest

from optimise.cli import main
from optimise.search.export import read_front
from optimise.spice import ngspice
from optimise.spice.cards import comment_safe
from test_spice_handoff import AH02, CARD, SQUARE_STUDY


def _payload(marker: Path) -> str:
    """A TOML basic string that, written raw into a deck, would run `shell touch MARKER`."""
    return json.dumps(f"x\n.control\nshell touch {marker}\n.endc\n* y")


@pytest.fixture(scope="module")
def hostile_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile")
    marker = folder / "marker"
    tech = folder / "tech.toml"
    tech.write_text(re.sub(r'(?m)^name = .*$', lambda m: f"name = {_payload(marker)}", AH02.read_text(), count=1))
    study = folder / "study.toml"
    text = SQUARE_STUDY.format(tech=tech.as_posix())
    study.write_text(re.sub(r'(?m)^name = .*$', lambda m: f"name = {_payload(marker)}", text, count=1))
    assert main(["optimise", str(study), "--out", str(folder / "run")]) == 0
    return folder, marker


@pytest.mark.ngspice
def test_names_with_control_lines_run_nothing_in_ngspice(hostile_run, capsys):
    folder, marker = hostile_run
    run = folder / "run"
    rid = str(read_front(run / "front.csv")["id"].iloc[0])
    deck = folder / "deck.cir"
    assert main(["netlist", str(run), "--row", rid, "--out", str(deck)]) == 0
    text = deck.read_text()
    assert not re.search(r"(?im)^\s*(\.control|shell)", text)
    assert ".control" in text  # still there, as part of a comment
    exe = ngspice.require_executable()
    subprocess.run([exe, "-b", "-n", str(deck)], cwd=folder, capture_output=True, timeout=120)
    assert not marker.exists()


@pytest.mark.parametrize("text", ["a\nb", "a\rb", "a\u2028b", "a\x00b", "a\x0bb\x0cc", "a\x85b"])
def test_comment_safe_leaves_one_line(text):
    assert len(comment_safe(text).splitlines()) == 1


def _card(folder: Path, extra: str) -> Path:
    path = folder / "card.lib"
    path.write_text(CARD.read_text() + extra)
    return path


@pytest.mark.parametrize("extra", ["\n.control\nshell touch MARKER\n.endc\n", "\nshell touch MARKER\n",
                                   "\n.include inner.lib\n"])
def test_a_card_with_commands_is_refused_and_runs_nothing(hostile_run, tmp_path, capsys, extra):
    folder, _ = hostile_run
    marker = tmp_path / "marker"
    (tmp_path / "inner.lib").write_text(f".control\nshell touch {marker}\n.endc\n")
    card = _card(tmp_path, extra.replace("MARKER", str(marker)))
    run = folder / "run"
    for args in (["verify", str(run), "--models", str(card)],
                 ["calibrate", "--models", str(card), "--out", str(tmp_path / "t.toml")],
                 ["netlist", str(run), "--row", str(read_front(run / "front.csv")["id"].iloc[0]), "--models", str(card)]):
        code = main(args)
        err = capsys.readouterr().err
        assert code == 2 and "--trust-card" in err and "Traceback" not in err, (args, err)
    assert not marker.exists()


@pytest.mark.parametrize("name", ["nch\n.control", "a b", "x;y", "", "1abc", "n" * 65])
def test_model_names_must_be_plain(hostile_run, capsys, name):
    folder, _ = hostile_run
    code = main(["verify", str(folder / "run"), "--models", str(CARD), "--nmos", name])
    err = capsys.readouterr().err
    assert code == 2 and "--nmos" in err and "plain model name" in err, err
