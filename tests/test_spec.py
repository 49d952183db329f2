"""Spec: validation messages, immutability, JSON round trip."""

import pytest

from stratagem import Spec
from stratagem.errors import SpecError


def test_level_out_of_range_names_parameter_and_rule():
    with pytest.raises(SpecError, match=r"The 'level' parameter must be a float in \(0, 1\).*got 1.5"):
        Spec(exposure="a", outcome="y", level=1.5)


def test_unknown_method_lists_choices():
    with pytest.raises(SpecError, match=r"'method' parameter must be one of 'crude'.*'aipw'.*got 'magic'"):
        Spec(exposure="a", outcome="y", method="magic")


def test_unknown_parameter_lists_valid_ones():
    with pytest.raises(SpecError, match=r"Unknown parameter\(s\) \['stratum'\].*Valid parameters: exposure"):
        Spec.from_fields(None, exposure="a", outcome="y", stratum=("x",))


def test_missing_required_fields_say_how():
    with pytest.raises(SpecError, match=r"'outcome' parameter\(s\) are required"):
        Spec.from_fields(None, exposure="a")


def test_same_column_in_two_roles_is_refused():
    with pytest.raises(SpecError, match="cannot also be in strata"):
        Spec(exposure="a", outcome="y", strata=("a",))
    with pytest.raises(SpecError, match="same column"):
        Spec(exposure="a", outcome="a")


def test_bins_must_name_a_modifier():
    with pytest.raises(SpecError, match="not in strata"):
        Spec(exposure="a", outcome="y", bins={"age": 3})


def test_bins_rules_are_checked():
    with pytest.raises(SpecError, match="bin count"):
        Spec(exposure="a", outcome="y", strata=("age",), bins={"age": 1})
    with pytest.raises(SpecError, match="bin count"):
        Spec(exposure="a", outcome="y", strata=("age",), bins={"age": [10, 5]})


def test_lists_become_tuples_and_spec_is_frozen():
    s = Spec(exposure="a", outcome="y", strata=["m1", "m2"], bins={"m1": [0, 1, 2]})
    assert s.strata == ("m1", "m2")
    assert s.bins == {"m1": (0.0, 1.0, 2.0)}
    with pytest.raises(AttributeError):
        s.level = 0.9  # type: ignore[misc]


def test_string_strata_means_one_modifier():
    assert Spec(exposure="a", outcome="y", strata="sex").strata == ("sex",)


def test_json_round_trip_gives_equal_spec():
    s = Spec(
        exposure="a",
        outcome="y",
        confounders=("c1", "c2"),
        strata=("m",),
        method="crude",
        measure="rr",
        level=0.9,
        bins={"m": 3},
        correction=0.5,
        truncate=(1, 99),
    )
    back = Spec.from_json(s.to_json())
    assert back == s
    assert isinstance(back.strata, tuple)


def test_replace_returns_new_spec_and_validates():
    s = Spec(exposure="a", outcome="y")
    t = s.replace(measure="or")
    assert s.measure is None and t.measure == "or"
    with pytest.raises(SpecError, match="'n_boot'"):
        s.replace(n_boot=3)


def test_from_json_rejects_garbage_with_advice():
    with pytest.raises(SpecError, match="Spec.to_json"):
        Spec.from_json("{not json")


def test_modifier_named_like_a_result_column_is_refused():
    with pytest.raises(SpecError, match=r"\['stratum'\].*rename them.*'stratum_group'"):
        Spec(exposure="a", outcome="y", strata=("stratum",))
