"""The simulation lab widget: traits set as the front end sets them give exactly the pure calls' numbers."""

from __future__ import annotations

import json
import time

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.errors import SpecError
from stratagem.simlab import LabSetup, compare, draw, repeat_draws
from stratagem.widgets import SimulationLab
from stratagem.widgets.simulation_lab import MAX_DRAWS, draw_payload

# What the front end writes when the user edits the levels table (plain JSON numbers).
FRONT_END_GROUPS = [
    {"level": "young", "weight": 0.6, "doomed": 0.2, "causal": 0.3, "preventive": 0.05, "immune": 0.45},
    {"level": "old", "weight": 0.4, "doomed": 0.4, "causal": 0.1, "preventive": 0.1, "immune": 0.4},
]


def _same_setup(lab: SimulationLab) -> LabSetup:
    """The LabSetup a user would write by hand for what the widget shows."""
    shares = {g["level"]: {t: g[t] for t in ("doomed", "causal", "preventive", "immune")} for g in lab.groups}
    weights = {g["level"]: g["weight"] for g in lab.groups}
    return LabSetup(shares=shares, weights=weights, n=lab.n, confounding=lab.confounding, method=lab.method,
                    level=lab.level)


def _assert_payload_matches(payload: dict, table: pd.DataFrame) -> None:
    for row in payload["rows"]:
        part = table[table["stratum"] == row["stratum"]].set_index("role")
        assert row["truth"] == part.loc["truth", "estimate"]
        for role in ("crude", "adjusted"):
            for key in ("estimate", "ci_low", "ci_high", "se"):
                assert row[role][key] == part.loc[role, key], (row["stratum"], role, key)
            assert row[role]["covered"] == bool(part.loc[role, "covered"])


@pytest.fixture
def lab():
    widget = SimulationLab(n=600, seed=2, sync=True)
    yield widget
    widget.close()


def test_first_draw_is_the_pure_draw(lab):
    setup = LabSetup(n=600)
    assert lab.setup == setup
    table = compare(draw(setup, 2))
    pd.testing.assert_frame_equal(lab.comparison, table)
    _assert_payload_matches(lab._draw, table)
    assert [r["stratum"] for r in lab._draw["rows"]] == ["group=low", "group=high", "overall"]
    assert lab._status["state"] == "idle"
    json.dumps(lab._draw, allow_nan=False)  # plain JSON for the front end


def test_front_end_edits_give_exactly_the_pure_calls(lab):
    with lab.hold_trait_notifications():
        lab.groups = FRONT_END_GROUPS
        lab.confounding = 0.7
        lab.n = 900
        lab.method = "ipw"
        lab.level = 0.9
    lab.seed = 5
    setup = _same_setup(lab)
    assert lab.setup == setup and setup.method == "ipw" and setup.level == 0.9
    pure = draw(setup, 5)
    _assert_payload_matches(lab._draw, compare(pure))
    # and the code it shows, run as the user would run it, gives the same numbers
    namespace: dict = {}
    exec(lab._draw["code"], namespace)
    for role in ("truth", "crude", "adjusted"):
        np.testing.assert_array_equal(
            namespace[role].strata[["estimate", "ci_low", "ci_high"]].to_numpy(),
            getattr(pure, role).strata[["estimate", "ci_low", "ci_high"]].to_numpy(),
        )
    assert [r["stratum"] for r in lab._draw["rows"]] == ["group=young", "group=old", "overall"]
    assert lab._draw["rows"][0]["set_effect"] == pytest.approx(0.25)


def test_repeat_button_gives_exactly_repeat_draws(lab):
    lab.draws = 3
    lab.repeating = True  # the Repeat button
    assert lab.repeating is False  # Python hands the button back when done
    assert lab._repeat_status["state"] == "done"
    expected = repeat_draws(LabSetup(n=600), draws=3, seed=2)
    pd.testing.assert_frame_equal(lab.repeats, expected)
    got = pd.DataFrame(lab._repeats["rows"])
    np.testing.assert_array_equal(got["bias"].to_numpy(), expected["bias"].to_numpy())
    np.testing.assert_array_equal(got["coverage"].to_numpy(), expected["coverage"].to_numpy())
    namespace: dict = {}
    exec(lab._repeats["code"], namespace)
    pd.testing.assert_frame_equal(namespace["runs"], expected)
    json.dumps(lab._repeats, allow_nan=False)


def test_changing_the_setup_clears_the_repeats(lab):
    lab.repeat(draws=2)
    assert lab._repeats
    lab.confounding = 0.2
    assert lab._repeats == {} and lab.repeats is None
    assert lab._repeat_status["state"] == "stale"
    assert "settings changed" in lab._repeat_status["message"]


def test_bad_shares_show_the_message_and_keep_the_last_draw(lab):
    before = lab._draw
    bad = [dict(FRONT_END_GROUPS[0], causal=0.9), FRONT_END_GROUPS[1]]
    lab.groups = bad
    assert lab._status["state"] == "error"
    assert "'young' sum to 1.6" in lab._status["message"]
    assert lab._draw == before
    lab.groups = FRONT_END_GROUPS
    assert lab._status["state"] == "idle"
    assert lab._draw["rows"][0]["stratum"] == "group=young"


@pytest.mark.parametrize(
    ("trait", "value", "match"),
    [
        ("n", 20, "from 50 to 50,000"),
        ("seed", -1, "random state"),
        ("groups", [], "at least one level"),
        ("groups", [dict(FRONT_END_GROUPS[0]), dict(FRONT_END_GROUPS[0])], "Two levels are called 'young'"),
        ("groups", [dict(FRONT_END_GROUPS[0], level=" ")], "has no name"),
    ],
)
def test_bad_inputs_become_error_status(lab, trait, value, match):
    setattr(lab, trait, value)
    assert lab._status["state"] == "error"
    assert match in lab._status["message"]


def test_too_many_draws_is_refused(lab):
    lab.draws = MAX_DRAWS + 1
    assert lab._repeat_status["state"] == "error"
    lab.repeating = True
    assert lab.repeating is False
    assert f"from 1 to {MAX_DRAWS}" in lab._repeat_status["message"]
    assert lab._repeats == {}


def test_constructor_validates():
    with pytest.raises(SpecError, match="sum to"):
        SimulationLab({"a": {"doomed": 0.5, "causal": 0.5, "preventive": 0.5, "immune": 0.0}}, sync=True)
    with pytest.raises(SpecError, match="draws"):
        SimulationLab(draws=0, sync=True)


def test_worker_thread_repeats_can_be_stopped_and_superseded():
    lab = SimulationLab(n=300, seed=0)
    try:
        lab.repeat(draws=200)
        deadline = time.monotonic() + 30
        while lab._repeat_status.get("done", 0) < 1 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert lab._repeat_status["state"] == "running"
        assert 0 < lab._repeat_status["progress"] < 1
        lab.stop()  # the Stop button
        assert lab._repeat_status["state"] == "stopped"
        time.sleep(0.5)
        assert lab._repeats == {} and lab._repeat_status["state"] == "stopped"  # the stale job never lands
        lab.repeat(draws=2)
        lab.seed = 9  # a new setting supersedes the running repeats
        lab.wait(60)
        assert lab._repeats == {}
        assert lab._draw["seed"] == 9
        pd.testing.assert_frame_equal(lab.comparison, compare(draw(LabSetup(n=300), 9)))
        lab.repeat(draws=2)
        lab.wait(60)
        pd.testing.assert_frame_equal(lab.repeats, repeat_draws(LabSetup(n=300), draws=2, seed=9))
    finally:
        lab.close()


def test_snapshot_html_escapes_and_carries_the_numbers():
    hostile = "<img src=x onerror=alert(1)>"
    shares = {hostile: {"doomed": 0.3, "causal": 0.2, "preventive": 0.0, "immune": 0.5},
              "b": {"doomed": 0.3, "causal": 0.1, "preventive": 0.0, "immune": 0.6}}
    lab = SimulationLab(shares, n=300, sync=True)
    try:
        data = lab._repr_mimebundle_()
        data = data[0] if isinstance(data, tuple) else data
        page = data["text/html"]
        assert "<img" not in page and "&lt;img" in page
        assert f"{lab._draw['rows'][0]['truth']:.3f}" in page
        assert "application/vnd.jupyter.widget-view+json" in data
    finally:
        lab.close()


def test_front_end_files_are_loaded():
    assert "export default" in str(SimulationLab._esm)
    assert ".sg-lab" in str(SimulationLab._css)


def test_draw_payload_axis_holds_every_value():
    setup = LabSetup(n=400, confounding=0.8)
    payload = draw_payload(setup, 1, compare(draw(setup, 1)))
    lo, hi = payload["axis"]["domain"]
    for row in payload["rows"]:
        for role in ("crude", "adjusted"):
            assert lo <= row[role]["ci_low"] and row[role]["ci_high"] <= hi
        assert lo <= 0 <= hi
    assert all(lo <= t <= hi for t in payload["axis"]["ticks"])
    assert sg.CAUTION == payload["caution"]
