"""The drill command and the false-alarm rates of lint, run in-process through main()."""

from __future__ import annotations

import json

import pytest

from detectors.planting import KINDS
from service.cli import main


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    assert main(["demo-data", "--out", str(folder)]) == 0
    return folder


def test_drill_on_the_demo_sample(demo, capsys):
    code = main(["drill", "--instrument", str(demo / "instrument.json"),
                 "--sample", str(demo / "responses.csv"), "--seeds", "1", "--format", "json"])
    assert code == 0
    result = json.loads(capsys.readouterr().out)
    assert result["simulation"] is True and result["seeds"] == [1]
    assert not result["ordinary_respondents_simulated"]
    assert result["ordinary"]["respondents"] == 600
    assert set(result["kinds"]) == set(KINDS)
    assert all(0.5 <= figures["auc"] <= 1 for figures in result["kinds"].values())


def test_drill_text_is_labelled_a_simulation_with_its_recipes(demo, capsys):
    assert main(["drill", "--instrument", str(demo / "instrument.json"), "--seeds", "2"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("SIMULATION: ")
    assert "answers simulated from the instrument" in out
    assert "Meade & Craig 2012" in out and "half_run: " in out
    assert "Ordinary respondents sent to review" in out


def test_drill_refuses_a_bad_sample(demo, tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("respondent_id,v01\nx,9\n")
    code = main(["drill", "--instrument", str(demo / "instrument.json"), "--sample", str(bad)])
    assert code == 2
    assert "error" in capsys.readouterr().err


def test_lint_states_expected_false_alarms(demo, capsys):
    assert main(["lint", str(demo / "instrument.json"), "--sample",
                 str(demo / "responses.csv")]) == 0
    out = capsys.readouterr().out
    assert "Expected false alarms, calibrated on the sample given" in out
    assert "mahalanobis" in out and "of ordinary respondents (score cut-off" in out
    assert "attention_checks" in out and "fixed rule" in out
