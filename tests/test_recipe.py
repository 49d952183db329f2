"""recipe(): the printed code reproduces the analysis exactly."""

import pandas as pd
import pytest

import stratagem as sg

CASES = [
    dict(strata=("lives_alone", "insulin"), method="crude", measure="rr"),
    dict(strata=("age",), bins={"age": [30, 50, 70, 95]}, method="crude", level=0.9),
    dict(strata=("sex",), potential_outcomes=("y0", "y1")),
    dict(strata=("sex",), method="crude", interval="bootstrap", n_boot=60, seed=11),
]


@pytest.mark.parametrize("case", CASES)
def test_recipe_reproduces_strata_exactly(demo, case):
    a = sg.analyze(demo, exposure="visited", outcome="on_target", **case)
    namespace = {"df": demo.copy()}
    exec(compile(a.recipe(), "<recipe>", "exec"), namespace)  # the test runs generated code on purpose
    b = namespace["analysis"]
    pd.testing.assert_frame_equal(a.strata, b.strata)
    pd.testing.assert_series_equal(a.overall, b.overall)
    assert b.spec == a.spec


def test_recipe_uses_requested_name(demo):
    a = sg.analyze(demo, exposure="visited", outcome="on_target")
    assert "sg.analyze(\n    patients," in a.recipe("patients")
    with pytest.raises(ValueError, match="identifier"):
        a.recipe("not a name")
