"""Repeated ids in the id column: counted against pandas, shown in the JSON,
the report and beside checklist line 8."""

from __future__ import annotations

import numpy as np
import pandas as pd

import holzinger as hz
import scalewright
from scalewright.repeats import SHOWN, repeated_ids
from scalewright.report.checklist import checklist_rows
from scalewright.report.render import render_html


def test_repeats_are_counted_as_pandas_counts_duplicates():
    # outside reference: pandas' duplicated(keep=False) marks every row whose id repeats
    rng = np.random.default_rng(5)
    ids = rng.integers(0, 400, size=500).astype(float)
    ids[rng.random(500) < 0.05] = np.nan                     # empty ids are not compared
    found = repeated_ids(ids.astype(object), "tid")
    present = pd.Series(ids).dropna()
    assert found["n_rows"] == int(present.duplicated(keep=False).sum())
    assert found["n_ids_repeated"] == int(present[present.duplicated()].nunique())
    assert len(found["examples"]) == SHOWN
    assert f"and {found['n_ids_repeated'] - SHOWN} more" in found["note"]
    first = found["examples"][0]
    assert all(ids[r - 1] == float(first["id"]) for r in first["rows"])   # rows count from 1


def test_ids_shown_as_written_and_nothing_without_repeats():
    found = repeated_ids(np.array([3.0, 4.0, 3.0, None, None, ""], dtype=object), "tid")
    assert found["examples"] == [{"id": "3", "rows": [1, 3]}]
    assert found["note"].startswith("The id column 'tid' gives 1 id to more than one row "
                                    "(2 rows: 3 in rows 1, 3).")
    assert repeated_ids(np.array(["a", "b", None, None], dtype=object), "tid") is None
    assert repeated_ids(None, None) is None


def test_a_duplicated_row_reaches_the_json_the_report_and_line_8(tmp_path):
    ids = [f"p{k}" for k in range(301)]
    ids[7] = "<b>p3</b>"                                  # user text: escaped in the report
    frame = hz.data().reset_index(drop=True).assign(pid=ids)
    frame = pd.concat([frame, frame.iloc[[7]]], ignore_index=True)     # row 8 exported twice
    frame.to_csv(tmp_path / "hs.csv", index=False)
    (tmp_path / "hs.yaml").write_text(
        "study: Holzinger and Swineford (1939)\ndata:\n  file: hs.csv\n  id: pid\nmodels:\n"
        "  three:\n    constructs:\n      visual: [x1, x2, x3]\n      textual: [x4, x5, x6]\n"
        "      speed: [x7, x8, x9]\n", encoding="utf-8")
    report = scalewright.check(tmp_path / "hs.yaml").to_dict()
    repeats = report["data"]["repeated_ids"]
    assert repeats["examples"] == [{"id": "<b>p3</b>", "rows": [8, 302]}]
    line_8 = next(r for r in checklist_rows(report) if r["number"] == 8)
    assert line_8["where"].endswith("the id column ‘pid’ repeats 1 id (section ‘The data’)")
    html = render_html(report)
    assert "Repeated ids" in html and "&lt;b&gt;p3&lt;/b&gt; in rows 8, 302" in html
    assert "<b>p3</b>" not in html
