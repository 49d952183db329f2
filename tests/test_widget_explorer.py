"""The Explorer widget, driven as the front end drives it: set the synced traits, read the result.

The synced ``_result`` must be exactly the payload of ``analyze()`` on the same Spec; stale results are
never published; errors keep the last good result; the static snapshot escapes data strings.
"""

from __future__ import annotations

import threading
import time

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.errors import ColumnNotFoundError, SpecError
from stratagem.estimate import bootstrap as bootstrap_module
from stratagem.widgets import explorer as explorer_module
from stratagem.widgets.explorer import Explorer, front_end_file
from stratagem.widgets.payload import analysis_payload
from stratagem.widgets.snapshot import axis, snapshot_html
from stratagem.widgets.worker import Superseded

HOSTILE = "<img src=x onerror=alert(1)>"


@pytest.fixture(scope="module")
def demo():
    return sg.demo_data()


def make(df, **kw):
    kw.setdefault("exposure", "visited")
    kw.setdefault("outcome", "on_target")
    kw.setdefault("method", "crude")
    return Explorer(df, **kw)


def reference(df, explorer):
    """The payload analyze() gives for the Explorer's Spec, computed independently of the widget."""
    return analysis_payload(sg.analyze(df, **explorer.spec.to_dict()))


def test_front_end_files_are_found():
    assert front_end_file("explorer.js").read_text().startswith("//")
    assert ".sg-explorer" in front_end_file("explorer.css").read_text()


def test_first_result_is_ready_after_construction(demo):
    ex = make(demo)
    assert ex._status["state"] == "idle"
    assert ex.analysis is not None
    assert ex._result == reference(demo, ex)
    assert [r["stratum"] for r in ex._result["rows"]] == ["overall"]


@pytest.mark.parametrize(
    "changes",
    [
        {"strata": ["sex"]},
        {"strata": ["lives_alone", "insulin"], "measure": "rr"},
        {"strata": ["insulin", "lives_alone"], "measure": "or", "level": 0.9},
        {"strata": ["age"], "bins": {"age": 3}},
        {"strata": ["sex"], "interval": "bootstrap", "n_boot": 50},
    ],
)
def test_traits_give_exactly_analyze(demo, changes):
    ex = make(demo)
    for name, value in changes.items():  # one trait at a time, as a user clicks
        setattr(ex, name, value)
    ex.wait(60)
    assert ex._status["state"] == "idle", ex._status
    spec = ex.spec
    assert list(spec.strata) == changes["strata"]
    for name in ("measure", "level", "interval", "n_boot"):
        if name in changes:
            assert getattr(spec, name) == changes[name]
    expected = sg.analyze(demo, **spec.to_dict())
    assert ex._result == analysis_payload(expected)
    # and the numbers are analyze()'s numbers, row by row, to the last digit
    rows = ex._result["rows"]
    table = expected.to_frame()
    assert [r["stratum"] for r in rows] == list(table["stratum"])
    for r, (_, t) in zip(rows, table.iterrows()):
        for col in ("n", "mean_exposed", "mean_unexposed", "estimate", "ci_low", "ci_high"):
            assert r[col] == t[col] or (r[col] is None and np.isnan(t[col]))
    assert ex._result["recipe"] == expected.recipe()


@pytest.mark.parametrize("method", ["standardization", "ipw", "aipw", "mantel-haenszel"])
def test_adjusted_methods_match_analyze(demo, method):
    ex = make(demo, confounders=("age", "deprivation", "clinic_visits"), method=method, measure="rd")
    ex.strata = ["lives_alone"]
    ex.wait(60)
    assert ex._status["state"] == "idle", ex._status
    assert ex._result == reference(demo, ex)


def test_sync_mode_gives_the_same(demo):
    a = make(demo, sync=True)
    a.strata = ["sex", "insulin"]
    assert a._status["state"] == "idle"
    b = make(demo)
    b.strata = ["sex", "insulin"]
    b.wait(30)
    assert a._result == b._result == reference(demo, a)


def test_python_side_strata_and_constructor_strata(demo):
    ex = make(demo, strata=("insulin",), measure="rr")
    assert ex._result["modifiers"] == ["insulin"]
    ex.strata = ["sex"]  # from Python: the synced result follows (the front end redraws from it)
    ex.wait(30)
    assert ex._result["modifiers"] == ["sex"]
    assert ex.spec.measure == "rr"


def test_stale_result_is_never_published(demo, monkeypatch):
    calls = []
    real = explorer_module.analyze

    def recording(data, spec, progress=None):
        entry = {"strata": tuple(spec.strata), "outcome": "running"}
        calls.append(entry)
        try:
            out = real(data, spec, progress=progress)
        except Superseded:
            entry["outcome"] = "abandoned"
            raise
        entry["outcome"] = "finished"
        return out

    monkeypatch.setattr(explorer_module, "analyze", recording)
    # small replicate blocks, so progress (and the chance to stop) comes every 100 replicates
    monkeypatch.setattr(bootstrap_module, "CHUNK_CELLS", 100 * len(demo))
    ex = make(demo, strata=("sex",), n_boot=20_000)
    ex.wait(30)
    published = []
    ex.observe(lambda change: published.append(tuple(change["new"]["modifiers"])), names="_result")
    ex.interval = "bootstrap"  # a long bootstrap starts ...
    deadline = time.monotonic() + 10
    while ex._status.get("progress", 0) <= 0 and time.monotonic() < deadline:
        time.sleep(0.01)  # ... and reports progress ...
    assert 0 < ex._status["progress"] < 1, "bootstrap progress should be published while running"
    ex.interval = "wald"  # ... then a newer request supersedes it
    ex.strata = ["insulin"]
    ex.wait(60)
    assert ex._result["modifiers"] == ["insulin"]
    assert ex._result["interval"] == "wald"
    assert published == [("insulin",)], "a superseded result was published"
    long_run = [c for c in calls if c["strata"] == ("sex",)][-1]
    assert long_run["outcome"] == "abandoned", "the superseded bootstrap should stop early"
    assert ex._result == reference(demo, ex)


def test_error_keeps_last_result(demo):
    ex = make(demo, strata=("sex",))
    good = ex._result
    good_analysis = ex.analysis
    ex.level = 1.5
    ex.wait(30)
    assert ex._status["state"] == "error"
    assert "'level'" in ex._status["message"] and "(0, 1)" in ex._status["message"]
    assert ex._result == good and ex.analysis is good_analysis
    ex.strata = ["sex", "insulin"]  # still invalid: still the error, still the old result
    ex.wait(30)
    assert ex._status["state"] == "error" and ex._result == good
    html = ex._repr_mimebundle_()[0]["text/html"]
    assert "last one that succeeded" in html
    ex.level = 0.9
    ex.wait(30)
    assert ex._status["state"] == "idle" and ex._status["message"] == ""
    assert ex._result["modifiers"] == ["sex", "insulin"] and ex._result["level"] == 0.9


def test_data_error_message_names_the_problem(demo):
    ex = make(demo)
    ex.strata = ["sex"]
    ex.wait(30)
    ex.bins = {"sex": 3}  # bins for a non-numeric column
    ex.wait(30)
    assert ex._status["state"] == "error"
    assert "'sex'" in ex._status["message"] and "bins" in ex._status["message"]
    assert ex._result["modifiers"] == ["sex"]


def test_bins_for_columns_not_in_strata_are_ignored(demo):
    ex = make(demo, strata=("age",), bins={"age": 3})
    ex.strata = ["sex"]  # the front end may leave an old bins entry behind
    ex.wait(30)
    assert ex._status["state"] == "idle"
    assert ex.spec.bins == {}


def test_constructor_mistakes_raise_with_the_usual_messages(demo):
    with pytest.raises(SpecError, match="'level' parameter"):
        make(demo, level=2.0)
    with pytest.raises(ColumnNotFoundError, match="'nope'"):
        make(demo, strata=("nope",))
    with pytest.raises(SpecError, match="Unknown Explorer argument"):
        make(demo, colour="red")


def test_variables_describe_columns(demo):
    df = demo.assign(constant=1, code=[f"c{i % 40}" for i in range(len(demo))])
    ex = make(df, counts=None)
    by_name = {v["name"]: v for v in ex._variables}
    assert "visited" not in by_name and "on_target" not in by_name
    assert by_name["sex"] == {"name": "sex", "tag": "2 levels", "ok": True, "reason": "", "kind": "levels"}
    assert by_name["age"]["tag"].startswith("numeric") and by_name["age"]["kind"] == "numeric"
    assert by_name["constant"]["ok"] is False and "single value" in by_name["constant"]["reason"]
    assert by_name["code"]["ok"] is False and "40 levels" in by_name["code"]["reason"]
    only = make(demo, variables=["sex", "age"])
    assert [v["name"] for v in only._variables] == ["sex", "age"]


def test_user_frame_is_not_changed(demo):
    df = demo.copy()
    before = df.copy()
    ex = make(df, strata=("age",))
    ex.strata = ["age", "sex"]
    ex.measure = "rr"
    ex.wait(30)
    pd.testing.assert_frame_equal(df, before)


def test_results_are_handed_to_the_main_loop(demo, monkeypatch):
    """Inside a kernel the worker only schedules the delivery; traits change on the loop's thread."""
    queue = []
    monkeypatch.setattr(explorer_module, "kernel_post", lambda: queue.append)
    ex = make(demo)
    seen = []
    ex.observe(lambda change: seen.append(threading.current_thread().name), names="_result")
    runner = ex._runner
    runner._post = queue.append  # the constructor captured no loop outside a kernel
    ex.strata = ["sex"]
    deadline = time.monotonic() + 30
    while not queue and time.monotonic() < deadline:
        time.sleep(0.01)
    assert queue, "the worker should schedule the delivery"
    assert ex._result["modifiers"] == [], "the worker thread must not write the traits itself"
    for callback in list(queue):  # the main loop runs the scheduled callbacks
        callback()
    assert ex._result["modifiers"] == ["sex"]
    assert seen == [threading.main_thread().name]


def test_wait_on_the_main_thread_delivers_a_queued_result(demo):
    ex = make(demo)
    queue = []
    ex._runner._post = queue.append  # a main loop that cannot run while wait() blocks it
    ex.strata = ["insulin"]
    assert ex.wait(30) is ex.analysis
    assert ex._result["modifiers"] == ["insulin"]
    for callback in queue:  # the queued hand-off runs later and changes nothing
        callback()
    assert ex._result["modifiers"] == ["insulin"]


def test_display_bundle_and_update_through_display_id(demo, monkeypatch):
    import IPython.display as ipd

    shown, updated = [], []
    monkeypatch.setattr(ipd, "display", lambda *a, **k: shown.append((a, k)))
    monkeypatch.setattr(ipd, "update_display", lambda *a, **k: updated.append((a, k)))
    ex = make(demo)
    data, _ = ex._repr_mimebundle_()
    assert "application/vnd.jupyter.widget-view+json" in data
    assert "<table" in data["text/html"] and "<svg" in data["text/html"]
    assert sg.CAUTION.split(":")[0] in data["text/html"]
    ex._ipython_display_()
    (args, kw), = shown
    display_id = kw["display_id"]
    assert kw["raw"] is True and display_id
    assert "text/html" in args[0] and "application/vnd.jupyter.widget-view+json" in args[0]
    ex.strata = ["lives_alone"]
    ex.wait(30)
    assert updated, "a new result must refresh the displayed snapshot"
    args, kw = updated[-1]
    assert kw["display_id"] == display_id
    assert 'data-stratum="lives_alone=yes"' in args[0]["text/html"]


def hostile_frame():
    rng = np.random.default_rng(0)
    n = 400
    return pd.DataFrame(
        {
            "a": rng.integers(0, 2, n),
            "y": rng.integers(0, 2, n),
            HOSTILE: rng.choice(["<b>bold</b>", "x & y", '"quoted"'], n),
        }
    )


def test_snapshot_escapes_hostile_names_and_levels():
    df = hostile_frame()
    ex = Explorer(df, exposure="a", outcome="y", method="crude", strata=(HOSTILE,))
    assert ex._variables[0]["name"] == HOSTILE  # synced verbatim: the front end inserts it as text
    html = ex._repr_mimebundle_()[0]["text/html"]
    assert "<img" not in html and "<b>" not in html
    assert "&lt;img src=x onerror=alert(1)&gt;" in html
    assert "&lt;b&gt;bold&lt;/b&gt;" in html and "x &amp; y" in html and "&quot;quoted&quot;" in html
    rows = ex._result["rows"]
    assert {r["levels"][HOSTILE] for r in rows[:-1]} == {"<b>bold</b>", "x & y", '"quoted"'}


def test_snapshot_plot_geometry():
    rows = [
        {"stratum": "a", "estimate": 2.0, "ci_low": 1.0, "ci_high": 4.0, "status": "ok"},
        {"stratum": "overall", "estimate": 0.5, "ci_low": 0.25, "ci_high": 1.0, "status": "ok"},
    ]
    ax = axis(rows, True, 1.0, 0, 100)
    assert ax["x"](1.0) == pytest.approx((ax["x"](0.5) + ax["x"](2.0)) / 2)
    assert {0.5, 1, 2} <= set(ax["ticks"])
    lin = axis(rows[:1], False, 0.0, 10, 290)
    span = 4.0 - 0.0
    assert lin["domain"] == pytest.approx((0 - 0.05 * span, 4 + 0.05 * span))


def test_snapshot_marks_rows_that_are_not_estimable(demo):
    a = sg.analyze(demo, exposure="visited", outcome="on_target", method="crude", strata=("sex",))
    payload = analysis_payload(a)
    payload["rows"][0] = {**payload["rows"][0], "estimate": None, "status": "no exposed rows"}
    html = snapshot_html(payload)
    assert 'class="sg-reason"' in html and "no exposed rows" in html


# -- the effect transported to a target population ----------------------------------------------

def target_frame(demo):
    """A target population: mostly people living alone, on insulin (modifiers shifted)."""
    rng = np.random.default_rng(3)
    weight = np.where(demo["lives_alone"] == "yes", 4.0, 1.0) * np.where(demo["insulin"] == "yes", 2.0, 1.0)
    rows = rng.choice(len(demo), size=1500, p=weight / weight.sum())
    return demo.iloc[rows][["sex", "lives_alone", "insulin", "age"]].reset_index(drop=True)


def expected_transport(df, explorer, target, **kw):
    from stratagem.transport import transport
    from stratagem.widgets.payload import records

    result = transport(sg.analyze(df, **explorer.spec.to_dict()), target, **kw)
    return records(result.to_frame()), result


@pytest.mark.parametrize(
    "changes",
    [
        {"strata": ["lives_alone"]},
        {"strata": ["lives_alone", "insulin"], "measure": "rr"},
        {"strata": ["insulin"], "measure": "or", "level": 0.9},
        {"strata": ["age"], "bins": {"age": 3}},
        {"strata": ["lives_alone"], "interval": "bootstrap", "n_boot": 50},
    ],
)
def test_transport_rows_equal_transport_of_analyze(demo, changes):
    target = target_frame(demo)
    ex = make(demo, confounders=("deprivation", "clinic_visits"), method="aipw", target=target,
              target_name="clinic B")
    assert ex._transport["state"] == "error"  # no modifier yet: says what to do
    assert "Add a modifier" in ex._transport["message"] and ex.transported is None
    for name, value in changes.items():
        setattr(ex, name, value)
    ex.wait(60)
    assert ex._status["state"] == "idle", ex._status
    rows, result = expected_transport(demo, ex, target)
    assert ex._transport["state"] == "ok" and ex._transport["message"] == ""
    assert ex._transport["rows"] == rows  # exactly, to the last digit
    assert [r["population"] for r in rows] == ["study", "target"]
    assert rows[0]["estimate"] == ex._result["rows"][-1]["estimate"]  # the study row is the overall row
    assert rows[1]["estimate"] != rows[0]["estimate"]
    assert ex._transport["notes"] == list(result.notes)
    assert ex._transport["name"] == "clinic B" and ex._transport["n_target"] == 1500
    assert ex.transported.to_frame().equals(result.to_frame())
    assert ex._result == reference(demo, ex)  # the study's own result is unchanged by a target


def test_set_target_without_reanalysis_and_removal(demo, monkeypatch):
    ex = make(demo, strata=("lives_alone", "insulin"), measure="rr")
    assert ex._transport == {} and ex.target is None and ex.transported is None
    calls = []
    real = explorer_module.analyze
    monkeypatch.setattr(explorer_module, "analyze", lambda *a, **k: calls.append(1) or real(*a, **k))
    target = target_frame(demo)
    ex.set_target(target, name="district 2", sampled=False)
    assert calls == [], "picking a target reuses the Analysis on screen"
    rows, _ = expected_transport(demo, ex, target, sampled=False)
    assert ex._transport["rows"] == rows and ex._transport["n_target"] is None
    assert "sampled=False" in ex._transport["code"]
    labels = list(ex.analysis.strata["stratum"])
    shares = {labels[0]: 0.5, labels[-1]: 0.5}
    ex.set_target(shares, name="half and half")
    rows, _ = expected_transport(demo, ex, shares)
    assert ex._transport["rows"] == rows and ex._transport["name"] == "half and half"
    ex.set_target(None)
    assert ex._transport == {} and ex.transported is None
    assert "sg-target" not in ex._repr_mimebundle_()[0]["text/html"]


def test_transport_error_shows_in_its_place_only(demo):
    ex = make(demo, strata=("lives_alone",))
    good = ex._result
    ex.set_target(target_frame(demo).drop(columns="lives_alone"), name="no column")
    assert ex._transport["state"] == "error"
    assert "'lives_alone'" in ex._transport["message"] and "lacks modifier column" in ex._transport["message"]
    assert ex._status["state"] == "idle" and ex._result == good
    # a target stratum the study lacks: transport's ModifierError, named
    odd = target_frame(demo).assign(lives_alone="sometimes")
    ex.set_target(odd, name="odd")
    assert ex._transport["state"] == "error" and "'lives_alone=sometimes'" in ex._transport["message"]
    html = ex._repr_mimebundle_()[0]["text/html"]
    assert 'class="sg-transport-message"' in html and "lives_alone=sometimes" in html
    assert 'data-stratum="overall"' in html  # the rest of the snapshot stays
    # the next analysis with a fitting target recovers
    ex.set_target(target_frame(demo), name="fits")
    assert ex._transport["state"] == "ok"


def test_target_argument_checks(demo):
    with pytest.raises(sg.errors.DataError, match="target must be a pandas DataFrame"):
        make(demo, target=[1, 2, 3])
    ex = make(demo)
    with pytest.raises(SpecError, match="name must be a non-empty string"):
        ex.set_target(target_frame(demo), name="")
    with pytest.raises(SpecError, match="'sampled'"):
        ex.set_target(target_frame(demo), sampled="yes")


def test_target_picked_while_computing_is_used(demo, monkeypatch):
    """set_target() during a running job: the delivered result uses the newest target."""
    gate = threading.Event()
    real = explorer_module.analyze

    def slow(*a, **k):
        gate.wait(10)
        return real(*a, **k)

    ex = make(demo, strata=("insulin",))
    monkeypatch.setattr(explorer_module, "analyze", slow)
    ex.strata = ["lives_alone"]  # runs on the worker, blocked at the gate
    first, second = target_frame(demo), target_frame(demo).iloc[:300]
    ex.set_target(first, name="first")  # applied to the Analysis on screen (insulin) at once ...
    ex.set_target(second, name="second")
    gate.set()
    ex.wait(30)
    assert ex._result["modifiers"] == ["lives_alone"]
    rows, _ = expected_transport(demo, ex, second)
    assert ex._transport["name"] == "second" and ex._transport["rows"] == rows


def test_snapshot_shows_the_transported_effect(demo):
    ex = make(demo, strata=("lives_alone",), target=target_frame(demo), target_name=HOSTILE)
    html = ex._repr_mimebundle_()[0]["text/html"]
    assert '<tr class="sg-target" data-population="target">' in html
    assert '<g class="sg-target" data-population="target">' in html
    assert "<img" not in html and f"target: {HOSTILE}".replace("<", "&lt;").replace(">", "&gt;") in html
    from stratagem.widgets.snapshot import fmt

    estimate = ex._transport["rows"][1]["estimate"]
    assert fmt(estimate) in html
    assert "sg-transport-notes" in html and "same in the target" in html
    # the overall row and the target row are drawn on one axis: the target point sits at its value
    from stratagem.widgets.snapshot import LABEL_W, PAD, PLOT_W, target_row

    rows = ex._result["rows"]
    x = axis(rows + [target_row(ex._transport)], False, 0.0, LABEL_W + PAD, LABEL_W + PLOT_W - PAD)["x"]
    assert f'M{x(estimate):.2f} ' in html


# -- reuse of results for revisited choices ---------------------------------------------------------

def counting(monkeypatch):
    calls = []
    real = explorer_module.analyze

    def wrapped(data, spec, progress=None):
        calls.append(tuple(spec.strata))
        return real(data, spec, progress=progress)

    monkeypatch.setattr(explorer_module, "analyze", wrapped)
    return calls


def test_revisited_choice_reuses_its_result(demo, monkeypatch):
    calls = counting(monkeypatch)
    ex = make(demo, confounders=("age", "deprivation"), method="aipw", sync=True,
              target=target_frame(demo))
    ex.strata = ["sex"]
    first = ex._result
    ex.strata = ["insulin"]
    ex.measure = "rr"
    ex.measure = "rd"  # back to the ["insulin"], rd choice: reused
    ex.strata = ["sex"]  # reused
    assert calls == [(), ("sex",), ("insulin",), ("insulin",)]
    assert ex._result == first == reference(demo, ex)
    rows, _ = expected_transport(demo, ex, target_frame(demo))
    assert ex._transport["rows"] == rows


def test_table_changed_in_place_is_analysed_again(demo, monkeypatch):
    calls = counting(monkeypatch)
    df = demo.copy()
    ex = make(df, sync=True)
    ex.strata = ["sex"]
    ex.strata = ["insulin"]
    df.loc[df.index[:400], "on_target"] = 1 - df.loc[df.index[:400], "on_target"]  # the user edits it
    ex.strata = ["sex"]
    assert calls == [(), ("sex",), ("insulin",), ("sex",)], "a changed table must be analysed again"
    assert ex._result == reference(df, ex)
    assert ex._result != reference(demo, ex)
    # a reordering of the rows changes the digest too (bootstrap draws rows by position)
    spec = ex.spec
    shuffled = df.iloc[::-1].reset_index(drop=True)
    assert explorer_module._fingerprint(df, spec) != explorer_module._fingerprint(shuffled, spec)
    assert explorer_module._fingerprint(df, spec) == explorer_module._fingerprint(df.copy(), spec)


def test_large_tables_keep_no_extra_results(demo, monkeypatch):
    monkeypatch.setattr(explorer_module, "_CACHE_CELLS", len(demo))  # room for one result only
    calls = counting(monkeypatch)
    ex = make(demo, sync=True)
    ex.strata = ["sex"]
    ex.strata = []
    assert calls == [(), ("sex",), ()]
    assert len(ex._cache) == 0


def test_open_view_is_a_trait_that_does_not_recompute(demo, monkeypatch):
    import traitlets

    ex = make(demo, strata=("sex",), sync=True)
    calls = counting(monkeypatch)
    assert ex.view == "effects" and "view" in ex.keys and ex.trait_metadata("view", "sync")
    ex.view = "checks"  # as the front end writes it after a tab click
    assert calls == [] and ex._status["state"] == "idle"
    assert ex.get_state()["view"] == "checks"
    with pytest.raises(traitlets.TraitError):
        ex.view = "plot"
