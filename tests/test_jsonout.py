"""The ``studies`` array of the JSON contract, encoded column by column, against a plain build.

The reference here is written the obvious way (a dict per study from the result's tables, then
the standard library's json), independently of :mod:`audit.jsonout`.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import audit
from audit import export
from audit.cli import main
from audit.jsonout import INTEGER_METRICS, encode_numbers, encode_objects, study_chunks
from audit.resources import bundled_dir

DEMO = bundled_dir("demo_data") / "demo_portfolio.csv"


def _plain_studies(result: audit.AuditResult) -> list[dict]:
    def number(name: str, v: object) -> object:
        if isinstance(v, str) or v is None:
            return v
        v = float(v)
        if not math.isfinite(v):
            return None
        return int(v) if name in INTEGER_METRICS and abs(v) < 2**63 else v

    def per_row(frame: pd.DataFrame, make) -> dict[int, list]:
        out: dict[int, list] = {}
        for record in frame.to_dict("records"):
            out.setdefault(int(record["pos"]), []).append(make(record))
        return out

    errors = per_row(
        result.errors,
        lambda e: (
            f"{e['column']}"
            + (" (blank)" if e["value"] == "" else f" = '{e['value']}'")
            + f": {e['reason']}"
        ),
    )
    details = per_row(result.errors, lambda e: {k: e[k] for k in ("column", "value", "reason")})
    notes = per_row(result.notes, lambda r: r["text"])
    flags = per_row(result.findings, lambda f: {k: f[k] for k in ("rule", "severity", "message")})
    studies = []
    for i in range(len(result.table)):
        metrics = {}
        for name in result.metrics.columns:
            value = number(name, result.metrics[name].iloc[i])
            if name.startswith("reference_power_"):
                # The contract's object: {"0.2": p, "0.5": p, ...} (DESIGN.md section 9.3).
                metrics.setdefault("reference_power", {})[name.removeprefix("reference_power_")] = (
                    value
                )
            else:
                metrics[name] = value
        if "reference_power" in metrics and all(
            v is None for v in metrics["reference_power"].values()
        ):
            metrics["reference_power"] = None  # not computed at all, like any other metric
        studies.append(
            {
                "study_id": result.table["study_id"].iloc[i],
                "row": int(result.table["_row"].iloc[i]),
                "design": result.table["design"].iloc[i],
                "status": str(result.status[i]),
                "errors": errors.get(i, []),
                "error_details": details.get(i, []),
                "notes": notes.get(i, []),
                "metrics": metrics,
                "flags": flags.get(i, []),
            }
        )
    # Through the standard library's encoder and back, as a reader of the file would see them.
    return json.loads(json.dumps(studies))


def _portfolio_with_trouble() -> pd.DataFrame:
    demo = pd.read_csv(DEMO, dtype=str, keep_default_na=False)
    extra = pd.DataFrame(
        {
            "study_id": ['quote " and \\ back', "", "tiny-effect", "ünïcode ✓"],
            "design": ["two_means", "two_means", "two_means", "not_a_design"],
            "alpha": ["0.05", "0.05", "0.05", "0.05"],
            "planned_n1": ["50", "50", "50", "50"],
            "planned_n2": ["50", "abc", "50", "50"],
            "realized_n1": ["45", "45", "50", "45"],
            "realized_n2": ["44", "44", "50", "44"],
            "planned_sd": ["1", "1", "1", "1"],
            "planned_effect": ["0.5", "0.5", "1e-12", "0.5"],
        }
    )
    return pd.concat([demo, extra], ignore_index=True).fillna("")


def test_encoded_studies_equal_a_plain_build():
    result = audit.audit_table(_portfolio_with_trouble())
    assert (result.status == "invalid").sum() >= 2  # the reference covers error lists too
    expected = _plain_studies(result)
    for chunk in (1, 7, 10_000):
        text = b"[" + b",".join(study_chunks(result, chunk)) + b"]"
        assert json.loads(text) == expected, chunk
    assert result.to_dict()["studies"] == expected


def test_streamed_file_equals_the_indented_document(tmp_path, monkeypatch):
    result = audit.audit_table(_portfolio_with_trouble())
    small = tmp_path / "small.json"
    export.write_json(result, small)
    monkeypatch.setattr(export, "JSON_INDENT_LIMIT", 3)  # force the compact, streamed path
    large = tmp_path / "large.json"
    export.write_json(result, large)
    assert json.loads(small.read_text("utf-8")) == json.loads(large.read_text("utf-8"))
    assert large.read_bytes().count(b"\n") == 1  # compact: one line


def test_numbers_keep_their_double_and_sizes_are_integers():
    x = np.array([0.1, 1 / 3, 5e-324, -2.5e300, np.nan, np.inf, -np.inf, 1352.0, 2.0**70])
    texts = encode_numbers(x)
    back = [json.loads(t) for t in texts]
    assert back[:4] == [0.1, 1 / 3, 5e-324, -2.5e300]  # shortest text, same double
    assert back[4:7] == [None, None, None]
    sizes = [json.loads(t) for t in encode_numbers(x, integer=True)]
    assert sizes[7] == 1352 and isinstance(sizes[7], int)
    # Beyond the 64-bit range a size is the double it was computed as, in exponent form.
    assert sizes[8] == pytest.approx(2.0**70) and b"e" in encode_numbers(x, integer=True)[8]


@pytest.mark.parametrize(
    "values",
    [
        ["a", "b,c", "", "d\\", "\u00e9\u4e2d", "x\x00y", "line\nbreak", "a]", "[b"],  # no quote
        [",", "a", ","],  # a lone comma encodes as '","', the old cut mark
        ['say "hi"', 'a",', '","', '\\"', "plain"],  # quotes: each encoded on its own
        ["a", None, "b", float("nan"), "a"],  # missing values: null
        ["only"],
        [""],
        ["a", 3, "b"],  # not all texts
        [],
    ],
)
def test_encoded_texts_are_each_values_own_json(values):
    # Reference: the standard library's json module, one value at a time (nan as null).
    expected = [
        "null" if v is None or (isinstance(v, float) and math.isnan(v)) else json.dumps(v)
        for v in values
    ]
    got = encode_objects(np.array(values, dtype=object))
    assert len(got) == len(values)
    assert [json.loads(t) for t in got] == [json.loads(t) for t in expected]


def test_an_astronomical_required_size_is_written(tmp_path):
    # An effect of 1e-12 needs some 1e25 units: more than a 64-bit integer holds.
    result = audit.audit_table(_portfolio_with_trouble())
    tiny = int(np.flatnonzero(result.table["study_id"].to_numpy(dtype=object) == "tiny-effect")[0])
    study = result.to_dict()["studies"][tiny]
    assert study["metrics"]["n_required_plan"] > 1e24
    path = tmp_path / "out.json"
    export.write_json(result, path)
    assert json.loads(path.read_text("utf-8"))["studies"][tiny] == study
    # The CSV and the workbook carry it too (both used to stop with an internal error).
    export.write_csv(result, tmp_path / "out.csv")
    table = pd.read_csv(tmp_path / "out.csv", dtype=str, keep_default_na=False)
    assert float(table["n_required_plan"][tiny]) == pytest.approx(
        study["metrics"]["n_required_plan"]
    )
    assert table["n_required_plan"][0].isdigit()  # ordinary sizes stay whole numbers
    from audit.workbook import write_workbook

    write_workbook(result, tmp_path / "out.xlsx")


# -- cell texts that once broke the document (issue 13) --------------------------------------


_CELL_TEXT = st.one_of(
    st.sampled_from([",", '","', '"', "\\", '\\"', "\x00", "\r", "\n", "\u2028", "%b", "%s"]),
    st.text(alphabet=st.sampled_from(',"\\\x01\x1f\r\n ab%\u00e9'), max_size=8),
    st.text(max_size=6),
)


@settings(max_examples=60, deadline=None)
@given(ids=st.lists(_CELL_TEXT, min_size=1, max_size=6), chunk=st.integers(1, 4))
def test_any_cell_text_gives_a_document_that_parses_and_round_trips(ids, chunk):
    # Random study_ids, titles and a rejected alpha with quotes, backslashes, '","' and control
    # characters: the JSON always parses and gives the values back as they were.
    n = len(ids)
    frame = pd.DataFrame(
        {
            "study_id": ids,
            "design": ["estimate"] * n,
            "realized_se": ["1"] * n,
            "alpha": [*ids[1:], "0.05"][:n],
            "title": list(reversed(ids)),
        }
    )
    result = audit.audit_table(frame)
    for size in (chunk, 10_000):
        studies = json.loads(b"[" + b",".join(study_chunks(result, size)) + b"]")
        assert [s["study_id"] for s in studies] == result.table["study_id"].tolist()
    document = result.to_dict()
    details = [d["value"] for s in document["studies"] for d in s["error_details"]]
    assert details == result.errors["value"].astype(object).tolist()


def _lone_comma_portfolio(path, rows: int) -> None:
    lines = ["study_id,design,realized_se,alpha", '",",estimate,1,', 'B,estimate,1,","']
    lines += [f"S{i},estimate,1," for i in range(rows - 2)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


@pytest.mark.parametrize("rows", [2, 2_501])
def test_a_lone_comma_id_and_a_rejected_comma_cell_give_valid_json(tmp_path, capsys, rows):
    # Issue 13: a study_id ',' first in a chunk made check --json write invalid JSON (2,501
    # rows, exit 0) or fail with an internal error (small file); so did a rejected alpha ','.
    source = tmp_path / "in.csv"
    _lone_comma_portfolio(source, rows)
    out = tmp_path / "out.json"
    assert main(["check", str(source), "--quiet", "--json", str(out)]) == 0, capsys.readouterr()
    studies = json.loads(out.read_bytes())["studies"]
    assert len(studies) == rows and studies[0]["study_id"] == ","
    assert studies[1]["status"] == "invalid"
    assert studies[1]["error_details"][0]["value"] == ","
