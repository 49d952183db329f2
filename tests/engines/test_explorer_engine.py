"""The Explorer on a table that lives in DuckDB: chips summarised by engine queries, and every
result exactly the payload of ``analyze()`` on the same relation and Spec."""

import pytest

duckdb = pytest.importorskip("duckdb")

import stratagem as sg  # noqa: E402
from stratagem import engines  # noqa: E402
from stratagem.frame import modifier_summary  # noqa: E402
from stratagem.widgets.explorer import Explorer  # noqa: E402
from stratagem.widgets.payload import analysis_payload  # noqa: E402

CONF = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")


def test_modifier_summary_matches_pandas(demo, rel):
    for column in demo.columns:
        assert engines.modifier_summary(rel, column) == modifier_summary(demo, column), column
    assert engines.modifier_summary(rel, "district", max_levels=3)["ok"] is False


@pytest.mark.parametrize("changes", [
    {"strata": ["sex"]},
    {"strata": ["sex", "age"], "bins": {"age": 3}, "measure": "rr"},
    {"strata": ["lives_alone"], "method": "aipw"},
])
def test_explorer_on_relation_shows_exactly_analyze(demo, rel, changes):
    ex = Explorer(rel, exposure="visited", outcome="on_target", confounders=CONF, method="crude", sync=True)
    try:
        chips = {v["name"]: v for v in ex._variables}
        assert chips["age"]["tag"] == modifier_summary(demo, "age")["tag"]
        assert chips["district"]["ok"] and "visited" not in chips
        for name, value in changes.items():
            setattr(ex, name, value)
        ex.wait(60)
        assert ex._status["state"] == "idle", ex._status
        expected = sg.analyze(rel, **ex.spec.to_dict())
        assert ex._result == analysis_payload(expected)
        assert ex.analysis.extra["engine"]["engine"] == "DuckDB"
        checks = ex.analysis.diagnostics
        scanned = checks[checks["check"] == "rows scanned in DuckDB (the data stays there)"]
        assert list(scanned["value"]) == [len(demo)] and (scanned["warning"] == "").all()
    finally:
        ex.close()


def test_explorer_on_parquet_path(demo, tmp_path):
    path = tmp_path / "demo.parquet"
    demo.to_parquet(path)
    ex = Explorer(str(path), exposure="visited", outcome="on_target", strata=("insulin",), method="crude",
                  sync=True)
    try:
        assert ex._result == analysis_payload(sg.analyze(str(path), **ex.spec.to_dict()))
        row = {r["stratum"]: r for r in ex._result["rows"]}
        ref = sg.analyze(demo, **ex.spec.to_dict()).overall
        assert row["overall"]["estimate"] == pytest.approx(ref["estimate"], abs=1e-10)
    finally:
        ex.close()
