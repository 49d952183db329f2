"""The self-contained HTML report and the SVG interval plot."""

from __future__ import annotations

import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

import stratagem as sg
from stratagem.report import OKABE_ITO, interval_svg, package_versions, to_html


class _Page(HTMLParser):
    """Collects text, tags and the attributes of script/link/img/style tags; checks nesting."""

    VOID = {"meta", "link", "br", "img", "input", "hr", "rect", "line", "polygon", "circle", "path"}

    def __init__(self):
        super().__init__()
        self.text: list[str] = []
        self.tags: list[str] = []
        self.refs: list[tuple[str, dict]] = []
        self.stack: list[str] = []
        self.mismatched = 0

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        if tag in ("script", "link", "img", "iframe", "object", "embed", "audio", "video", "source"):
            self.refs.append((tag, dict(attrs)))
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.tags.append(tag)

    def handle_endtag(self, tag):
        if tag in self.VOID:
            return
        if self.stack and self.stack[-1] == tag:
            self.stack.pop()
        else:
            self.mismatched += 1

    def handle_data(self, data):
        self.text.append(data)


def _parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    page.close()
    return page


@pytest.fixture(scope="module")
def demo():
    return sg.demo_data()


@pytest.fixture(scope="module")
def crude(demo):
    return sg.analyze(demo, exposure="visited", outcome="on_target",
                      strata=("lives_alone", "insulin"), method="crude")


def test_report_parses_and_loads_nothing_from_outside(crude):
    text = to_html(crude)
    page = _parse(text)
    assert page.mismatched == 0 and page.stack == []
    assert "script" not in page.tags  # no scripts at all
    for tag, attrs in page.refs:
        for key in ("src", "href", "data"):
            assert not str(attrs.get(key, "")).startswith(("http:", "https:", "//")), (tag, attrs)
    assert not re.search(r"<(script|link)[^>]+(src|href)=[\"']?(https?:)?//", text)
    assert not re.search(r"@import|url\(\s*['\"]?https?:", text)
    assert "<svg" in text


def test_report_holds_the_numbers_and_the_job(crude):
    text = to_html(crude)
    body = " ".join(_parse(text).text)
    for _, row in crude.strata.iterrows():
        assert row["stratum"] in body
        for col in ("estimate", "ci_low", "ci_high", "mean_exposed", "mean_unexposed"):
            assert f"{row[col]:.3f}" in body, (col, row[col])
        assert f"{row['n']:,.0f}" in body
    o = crude.overall
    assert f"{o['estimate']:.3f} ({o['ci_low']:.3f} to {o['ci_high']:.3f})" in body
    for word in ("visited", "on_target", "crude", "risk difference", "lives_alone, insulin",
                 "Rows dropped", "Heterogeneity", "Code", "Software"):
        assert word in body, word
    assert sg.CAUTION in body
    # the recipe, unescaped back to text, is the Analysis's own
    assert crude.recipe("df").strip() in body
    for name, version in package_versions().items():
        assert f"{name} {version}" in body
    if len(crude.heterogeneity):
        for test_name in crude.heterogeneity["test"]:
            assert str(test_name) in body


def test_report_writes_the_file(crude, tmp_path):
    path = tmp_path / "r.html"
    text = to_html(crude, path, title="Home visits")
    assert path.read_text(encoding="utf-8") == text
    assert "<h1>Home visits</h1>" in text


def test_report_escapes_hostile_strings(tmp_path):
    df = sg.demo_data(n=600)
    hostile = "<script>alert('x')</script>"
    df = df.rename(columns={"visited": "<b>visited</b>", "on_target": 'on"target&'})
    df["lives_alone"] = df["lives_alone"].astype(str).map({"yes": hostile, "no": "<img src=x>"})
    a = sg.analyze(df, exposure="<b>visited</b>", outcome='on"target&', strata=("lives_alone",),
                   method="crude")
    text = to_html(a)
    page = _parse(text)
    assert "script" not in page.tags and "img" not in page.tags and "b" not in page.tags
    assert hostile not in text and "<img src=x>" not in text
    body = " ".join(page.text)
    assert hostile in body  # shown as text
    assert "<b>visited</b>" in body and 'on"target&' in body
    svg = interval_svg(a)
    assert hostile not in svg and "&lt;script&gt;" in svg


def test_report_with_ratio_measure_and_unestimable_stratum():
    rng = np.random.default_rng(3)
    n = 400
    df = pd.DataFrame({
        "group": rng.choice(["a", "b", "c"], n),
        "x": rng.integers(0, 2, n),
        "y": rng.integers(0, 2, n),
    })
    df.loc[df["group"] == "c", "x"] = 1  # stratum c has no unexposed rows
    a = sg.analyze(df, exposure="x", outcome="y", strata=("group",), method="crude", measure="rr")
    svg = interval_svg(a)
    status_c = a.strata.loc[a.strata["group"] == "c", "status"].iloc[0]
    assert status_c != "ok"
    assert status_c[:40] in svg.replace("&#x27;", "'")
    # log axis: the null line sits at 1 and ticks are ratios
    assert ">1</text>" in svg
    assert "log scale" in svg
    text = to_html(a)
    assert "se (log)" in text
    assert "<svg" in text


def test_interval_svg_draws_one_marker_per_estimable_row(crude):
    svg = interval_svg(crude)
    assert svg.count("<rect") == int((crude.strata["status"] == "ok").sum())
    assert svg.count("<polygon") == 1  # the overall diamond
    assert OKABE_ITO["blue"] in svg and OKABE_ITO["vermillion"] in svg
    assert ">0</text>" in svg and "linear scale" in svg


def test_report_without_strata_and_with_response_types(demo):
    a = sg.analyze(demo, exposure="visited", outcome="on_target", method="exact",
                   potential_outcomes=("y0", "y1"), strata=("insulin",))
    text = to_html(a)
    body = " ".join(_parse(text).text)
    assert "causal" in body and "preventive" in body
    share = a.response_types["lower"].iloc[0]
    assert f"{share:.3f}" in body
    b = sg.analyze(demo, exposure="visited", outcome="on_target", method="crude")
    text_b = to_html(b)
    assert "Overall" in text_b and f"{b.overall['estimate']:.3f}" in text_b


def test_report_does_not_change_the_analysis(crude):
    before = crude.strata.copy()
    to_html(crude)
    pd.testing.assert_frame_equal(before, crude.strata)


def test_analysis_to_html_method(crude, tmp_path):
    if not hasattr(sg.Analysis, "to_html"):
        pytest.skip("Analysis.to_html is not attached")
    assert crude.to_html() == to_html(crude)


# -- journal tables: CSV and LaTeX ----------------------------------------------------------------
def test_format_interval_and_p():
    from stratagem.export import format_interval, format_p

    assert format_interval(0.1234, -0.0456, 0.29) == "0.12 (-0.05 to 0.29)"
    assert format_interval(2.0, float("nan"), 3.0, digits=1) == "2.0"
    assert format_interval(float("nan"), 0, 1) == ""
    assert format_p(0.04321) == "0.043"
    assert format_p(0.0009) == "<0.001"
    assert format_p(0.0009, digits=4) == "0.0009"
    assert format_p(None) == ""


def test_journal_table_matches_the_analysis(crude):
    from stratagem.export import journal_table

    t = journal_table(crude, digits=2)
    effect = [c for c in t.columns if c.startswith("RD (95% CI)")]
    assert effect == ["RD (95% CI)"]
    assert len(t) == len(crude.strata) + 1
    for i, row in crude.strata.iterrows():
        assert t.loc[i, "RD (95% CI)"] == (
            f"{row['estimate']:.2f} ({row['ci_low']:.2f} to {row['ci_high']:.2f})")
        assert t.loc[i, "lives_alone"] == str(row["lives_alone"])
        assert t.loc[i, "risk if exposed"] == f"{row['mean_exposed']:.2f}"
    last = t.iloc[-1]
    assert last["lives_alone"] == "Overall" and last["insulin"] == ""
    assert last["n"] == f"{crude.overall['n']:,.0f}"


def test_to_csv_numbers_round_trip(crude, tmp_path):
    path = tmp_path / "t.csv"
    text = crude.to_csv(path)
    assert path.read_text(encoding="utf-8") == text
    back = pd.read_csv(path, keep_default_na=False)
    frame = crude.to_frame()
    for col in ("n", "estimate", "se", "ci_low", "ci_high", "mean_exposed"):
        np.testing.assert_allclose(back[col].astype(float), frame[col].astype(float), rtol=1e-12)
    assert list(back["stratum"]) == list(frame["stratum"])
    journal = crude.to_csv(style="journal")
    assert "(" in journal and " to " in journal
    with pytest.raises(sg.StratagemError, match="'style'.*'numbers', 'journal'"):
        crude.to_csv(style="fancy")


def test_to_latex_escapes_and_uses_booktabs(tmp_path):
    df = sg.demo_data(n=800).rename(columns={"lives_alone": "lives_alone&50%"})
    df["lives_alone&50%"] = df["lives_alone&50%"].astype(str).map({"yes": "y_es#1", "no": "n{o}"})
    a = sg.analyze(df, exposure="visited", outcome="on_target", strata=("lives_alone&50%",),
                   method="crude", measure="rr")
    tex = a.to_latex(label="tab:visits", path=tmp_path / "t.tex")
    assert (tmp_path / "t.tex").read_text(encoding="utf-8") == tex
    assert r"\toprule" in tex and r"\midrule" in tex and r"\bottomrule" in tex
    assert r"lives\_alone\&50\%" in tex
    assert r"y\_es\#1" in tex and r"n\{o\}" in tex
    assert r"\label{tab:visits}" in tex
    assert "RR (95\\% CI)" in tex
    o = a.overall
    assert f"{o['estimate']:.2f} ({o['ci_low']:.2f} to {o['ci_high']:.2f})" in tex
    assert "<0.001" not in tex  # '<' is escaped for LaTeX
    body = tex.split(r"\midrule")[1]
    assert "_" not in body.replace(r"\_", "")
