"""Analysis: the frozen result of :func:`stratagem.analyze`, as tidy pandas tables, plus its recipe.

Every table is a new DataFrame built once; accessors return copies, so a caller cannot change the
Analysis by editing what it got.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .measures import RATIO
from .spec import Spec

__all__ = [
    "Analysis",
    "STRATA_COLUMNS",
    "OVERALL_FIELDS",
    "HETEROGENEITY_COLUMNS",
    "RESPONSE_TYPE_COLUMNS",
    "DIAGNOSTIC_COLUMNS",
    "CAUTION",
]

STRATA_COLUMNS = [
    "stratum",
    "n",
    "n_exposed",
    "n_unexposed",
    "mean_exposed",
    "mean_unexposed",
    "estimate",
    "se",
    "ci_low",
    "ci_high",
    "p_value",
    "status",
]
OVERALL_FIELDS = [
    "estimate",
    "se",
    "ci_low",
    "ci_high",
    "p_value",
    "n",
    "n_exposed",
    "n_unexposed",
    "mean_exposed",
    "mean_unexposed",
    "status",
]
HETEROGENEITY_COLUMNS = ["test", "statistic", "df", "p_value", "note"]
RESPONSE_TYPE_COLUMNS = ["stratum", "type", "lower", "upper"]
DIAGNOSTIC_COLUMNS = ["stratum", "check", "arm", "value", "warning"]

CAUTION = (
    "Subgroup findings are exploratory: with many subgroups some differences arise by chance, and an "
    "average effect in a subgroup is not a prediction for one person. Do not use these results alone "
    "to guide the care of people; follow clinical guidelines, ethics review and local regulations."
)

MEASURE_NAMES = {
    "rd": "risk difference",
    "rr": "risk ratio",
    "or": "odds ratio",
    "md": "mean difference",
}


def _empty(columns: list[str]) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})


@dataclass(frozen=True, eq=False)
class Analysis:
    """Result of one analysis. Build it with :func:`stratagem.analyze`, not directly.

    Attributes
    ----------
    spec : Spec
        The resolved Spec (method and measure filled in) that reproduces this result.
    overall : pandas.Series
        Effect in the whole sample: estimate, se, ci_low, ci_high, p_value, n, n_exposed,
        n_unexposed, mean_exposed, mean_unexposed, status. For ``rr``/``or`` the ``se`` is on the
        log scale.
    strata : pandas.DataFrame
        One row per stratum: one column per modifier, then the columns of :data:`STRATA_COLUMNS`.
        Empty when no modifiers were given.
    heterogeneity, response_types, diagnostics : pandas.DataFrame
        Tests of effect modification, response-type shares or bounds, and per-stratum checks.
    notes : tuple of str
        What was done to the data and what the user should know (rows dropped, bins, warnings).
    """

    spec: Spec
    overall: pd.Series
    strata: pd.DataFrame
    heterogeneity: pd.DataFrame = field(default_factory=lambda: _empty(HETEROGENEITY_COLUMNS))
    response_types: pd.DataFrame = field(default_factory=lambda: _empty(RESPONSE_TYPE_COLUMNS))
    diagnostics: pd.DataFrame = field(default_factory=lambda: _empty(DIAGNOSTIC_COLUMNS))
    notes: tuple = ()
    n_input: int = 0
    n_dropped: int = 0
    extra: dict = field(default_factory=dict, repr=False)

    # -- tables ----------------------------------------------------------------------------------
    @property
    def modifiers(self) -> list[str]:
        """The modifier columns of :attr:`strata`, in nesting order."""
        return list(self.spec.strata)

    @property
    def scale_note(self) -> str:
        """One line saying what the estimate is and on which scale ``se`` is."""
        m = self.spec.measure
        if m in RATIO:
            return f"{MEASURE_NAMES[m]}; se is on the log scale, the interval on the ratio scale"
        return f"{MEASURE_NAMES.get(m, m)}; se on the same scale"

    def to_frame(self) -> pd.DataFrame:
        """Strata rows followed by one ``overall`` row, in one DataFrame."""
        overall = {name: "" for name in self.modifiers}
        overall.update({k: self.overall[k] for k in OVERALL_FIELDS})
        overall["stratum"] = "overall"
        rows = pd.DataFrame([overall])
        if len(self.strata) == 0:
            return rows[self.modifiers + STRATA_COLUMNS].reset_index(drop=True)
        both = pd.concat([self.strata, rows], ignore_index=True)
        return both[self.modifiers + STRATA_COLUMNS + [c for c in self.strata.columns
                                                        if c not in self.modifiers + STRATA_COLUMNS]]

    def formatted(self, digits: int = 3) -> pd.DataFrame:
        """Journal-style table: stratum, n, estimate (lower to upper), p-value, status."""
        frame = self.to_frame()

        def fmt(v):
            return "" if v is None or (isinstance(v, float) and np.isnan(v)) else f"{v:.{digits}f}"

        out = pd.DataFrame(
            {
                "stratum": frame["stratum"],
                "n": frame["n"].map(lambda v: f"{v:,.0f}"),
                "exposed": frame["mean_exposed"].map(fmt),
                "unexposed": frame["mean_unexposed"].map(fmt),
                self.spec.measure: [
                    (f"{fmt(e)} ({fmt(lo)} to {fmt(hi)})" if s == "ok" and np.isfinite(lo) else fmt(e))
                    for e, lo, hi, s in zip(
                        frame["estimate"], frame["ci_low"], frame["ci_high"], frame["status"]
                    )
                ],
                "p": frame["p_value"].map(lambda p: "" if not np.isfinite(p) else
                                          ("<0.001" if p < 0.001 else f"{p:.3f}")),
                "status": frame["status"],
            }
        )
        return out

    def to_markdown(self, digits: int = 3) -> str:
        """A Markdown table of the strata and the overall effect, with the scale and the caution."""
        table = self.formatted(digits)
        head = "| " + " | ".join(table.columns) + " |"
        rule = "|" + "|".join("---" for _ in table.columns) + "|"
        body = [
            "| " + " | ".join(str(v).replace("|", "\\|") for v in row) + " |"
            for row in table.itertuples(index=False)
        ]
        title = (
            f"Effect of {self.spec.exposure} on {self.spec.outcome} "
            f"({self.spec.method}, {self.scale_note}, {self.spec.level:.0%} interval)"
        )
        return "\n".join([title, "", head, rule, *body, "", f"_{CAUTION}_", ""])

    # -- exports (implemented in stratagem.report and stratagem.export) --------------------------
    def to_html(self, path=None, **options) -> str:
        """Self-contained HTML report (no network); see :func:`stratagem.report.to_html`."""
        from .report import to_html

        return to_html(self, path, **options)

    def to_latex(self, path=None, **options) -> str:
        """LaTeX table, journal style; see :func:`stratagem.export.to_latex`."""
        from .export import to_latex

        return to_latex(self, path, **options)

    def to_csv(self, path=None, **options) -> str:
        """CSV of the strata and overall rows; see :func:`stratagem.export.to_csv`."""
        from .export import to_csv

        return to_csv(self, path, **options)

    # -- reproduction ----------------------------------------------------------------------------
    def recipe(self, data_name: str = "df") -> str:
        """Python source that, run with the same table bound to ``data_name``, gives this result."""
        if not data_name.isidentifier():
            raise ValueError(f"data_name must be a Python identifier; got {data_name!r}.")
        lines = [
            "import stratagem as sg",
            "",
            f"# `{data_name}` is the table this analysis was run on.",
            "analysis = sg.analyze(",
            f"    {data_name},",
        ]
        for key, value in self.spec.changed_fields().items():
            lines.append(f"    {key}={_literal(value)},")
        lines += [")", "analysis.strata  # per-stratum effects; analysis.overall for everyone", ""]
        return "\n".join(lines)

    # -- display ---------------------------------------------------------------------------------
    def __repr__(self) -> str:
        o = self.overall
        return (
            f"<Analysis {self.spec.method} {self.spec.measure}: {len(self.strata)} strata, "
            f"overall {o['estimate']:.4g} ({o['ci_low']:.4g} to {o['ci_high']:.4g}), n={o['n']:.0f}>"
        )

    def _repr_html_(self) -> str:
        table = self.formatted().to_html(index=False, escape=True, border=0)
        title = html.escape(
            f"Effect of {self.spec.exposure} on {self.spec.outcome} — {self.spec.method}, "
            f"{self.scale_note}, {self.spec.level:.0%} interval"
        )
        notes = "".join(f"<li>{html.escape(n)}</li>" for n in self.notes)
        return (
            f"<div><p><strong>{title}</strong></p>{table}"
            + (f"<ul>{notes}</ul>" if notes else "")
            + f"<p><em>{html.escape(CAUTION)}</em></p></div>"
        )


def _literal(value) -> str:
    """Python literal for a Spec value (plain types only, so ``repr`` is valid source)."""
    if isinstance(value, dict):
        return "{" + ", ".join(f"{k!r}: {_literal(v)}" for k, v in value.items()) + "}"
    if isinstance(value, tuple):
        inner = ", ".join(_literal(v) for v in value)
        return f"({inner},)" if len(value) == 1 else f"({inner})"
    return repr(value)
