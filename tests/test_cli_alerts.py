"""`takeup alerts`: summary by rule and severity first, filters, unknown names refused, --json rows.

The warehouse is the small invented run of tests/test_report.py (six alerts of the latest
run, one of an older run); every expected count is computed here from the rows inserted
there, with pandas as the reference for the grouping.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest

from takeup.pipeline.cli import main
from tests.test_report import RUN, SITES, build_warehouse


@pytest.fixture()
def wh(tmp_path, monkeypatch):
    con = build_warehouse(tmp_path, monkeypatch)
    rows = con.execute("SELECT * FROM alerts WHERE run_id = ?", [RUN]).df()
    con.close()
    return tmp_path / "w.duckdb", rows


def _json(capsys, *argv) -> list[dict]:
    assert main(["alerts", *argv, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_summary_comes_first_and_counts_by_rule_and_severity(wh, capsys):
    path, rows = wh
    assert main(["alerts", "--warehouse", str(path)]) == 0
    out = capsys.readouterr().out
    assert out.index("summary by rule and severity") < out.index("rows:")
    summary = out[out.index("summary by rule and severity"):out.index("rows:")]
    # reference: pandas crosstab of the inserted rows
    ref = pd.crosstab([rows["rule"], rows["severity"]], rows["status"])
    for (rule, sev), counts in ref.iterrows():
        line = next(ln for ln in summary.splitlines() if ln.split()[:2] == [rule, sev])
        nums = [int(x) for x in line.split()[2:]]
        assert nums[:3] == [int(counts.get(s, 0)) for s in ("new", "ongoing", "resolved")], line
    # most severe first: the critical rule's line precedes the info one
    assert summary.index("treatment_uptake_drift") < summary.index("heterogeneity")
    assert f"{len(rows)} rows" in out


def test_filters_by_site_rule_and_severity(wh, capsys):
    path, rows = wh
    w = ["--warehouse", str(path)]
    got = _json(capsys, *w, "--site", SITES[3])
    assert sorted(r["rule"] for r in got) == sorted(rows.loc[rows.site_id == SITES[3], "rule"])
    got = _json(capsys, *w, "--rule", "weak_first_stage")
    assert {r["site_id"] for r in got} == {SITES[3], SITES[4]}
    got = _json(capsys, *w, "--severity", "warning", "--severity", "critical")
    assert len(got) == int(rows.severity.isin(["warning", "critical"]).sum())
    got = _json(capsys, *w, "--rule", "weak_first_stage", "--site", SITES[4], "--status", "ongoing")
    assert [(r["rule"], r["site_id"], r["status"]) for r in got] == [("weak_first_stage", SITES[4], "ongoing")]


def test_json_shape_is_the_rows(wh, capsys):
    path, rows = wh
    got = _json(capsys, "--warehouse", str(path))
    assert len(got) == len(rows)
    assert list(got[0]) == ["status", "severity", "rule", "site_id", "outcome", "value", "threshold", "p_value",
                            "first_seen_run_id", "message"]


def test_unknown_names_are_refused_with_the_nearest(wh, capsys):
    path, _ = wh
    assert main(["alerts", "--warehouse", str(path), "--rule", "outlier_sites"]) == 2
    assert "did you mean 'outlier_site'" in capsys.readouterr().err
    assert main(["alerts", "--warehouse", str(path), "--site", "Brookfeld"]) == 2
    assert "did you mean 'Brookfield'" in capsys.readouterr().err
    with pytest.raises(SystemExit) as e:
        main(["alerts", "--warehouse", str(path), "--severity", "warn"])
    assert e.value.code == 2
    assert "did you mean 'warning'" in capsys.readouterr().err
