"""Tables of an Analysis for papers and spreadsheets: journal-style text, CSV and LaTeX.

Journal style follows common reporting practice (e.g. the CONSORT and STROBE explanations): an
estimate with its interval as ``estimate (lower to upper)`` ("to" rather than a hyphen, which is
ambiguous next to negative numbers), risks and differences to a fixed number of decimals, and
p-values to three decimals with ``<0.001`` below that.
"""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd

from .measures import RATIO
from .results import CAUTION, MEASURE_NAMES, Analysis

__all__ = ["format_interval", "format_p", "journal_table", "to_csv", "to_latex"]

ABBREVIATIONS = {"rd": "RD", "rr": "RR", "or": "OR", "md": "MD"}


def _finite(v) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def format_interval(estimate, low, high, digits: int = 2) -> str:
    """``"0.12 (0.08 to 0.16)"``; only the estimate when the interval is missing; ``""`` when all are.

    >>> format_interval(0.1234, -0.0456, 0.29, digits=2)
    '0.12 (-0.05 to 0.29)'
    """
    if not _finite(estimate):
        return ""
    est = f"{float(estimate):.{digits}f}"
    if _finite(low) and _finite(high):
        return f"{est} ({float(low):.{digits}f} to {float(high):.{digits}f})"
    return est


def format_p(p, digits: int = 3) -> str:
    """A p-value to ``digits`` decimals, ``"<0.001"`` (for 3 digits) below the smallest shown value.

    >>> format_p(0.04321), format_p(0.0000123), format_p(float("nan"))
    ('0.043', '<0.001', '')
    """
    if not _finite(p):
        return ""
    floor = 10.0 ** -digits
    return f"<{floor:.{digits}f}" if float(p) < floor else f"{float(p):.{digits}f}"


def journal_table(analysis: Analysis, digits: int = 2, p_digits: int = 3) -> pd.DataFrame:
    """The strata and the overall effect as a table of strings, ready for a manuscript.

    Columns: one per modifier (blank in the overall row), ``n``, the (adjusted) mean or risk under
    exposure and under no exposure, ``<MEASURE> (<level>% CI)`` as ``estimate (lower to upper)``,
    ``p``, and ``note`` (empty when the row was estimated, otherwise why not).

    Parameters
    ----------
    analysis : Analysis
    digits : int
        Decimals of means, estimates and interval limits.
    p_digits : int
        Decimals of p-values.

    Returns
    -------
    pandas.DataFrame
        A new frame of strings; the Analysis is not changed.
    """
    frame = analysis.to_frame()
    spec = analysis.spec
    risk = "risk" if spec.measure in ("rd", "rr", "or") else "mean"
    effect = f"{ABBREVIATIONS.get(spec.measure, spec.measure)} ({spec.level * 100:g}% CI)"
    out = pd.DataFrame(index=range(len(frame)))
    overall = frame["stratum"].eq("overall")
    if analysis.modifiers:
        for k, name in enumerate(analysis.modifiers):
            first = "Overall" if k == 0 else ""
            out[name] = [first if is_overall else str(v) for v, is_overall in zip(frame[name], overall)]
    else:
        out["group"] = ["Overall"] * len(frame)
    ok = frame["status"].eq("ok")
    out["n"] = [f"{float(v):,.0f}" if _finite(v) else "" for v in frame["n"]]
    out[f"{risk} if exposed"] = [f"{float(v):.{digits}f}" if _finite(v) else "" for v in frame["mean_exposed"]]
    out[f"{risk} if unexposed"] = [f"{float(v):.{digits}f}" if _finite(v) else ""
                                   for v in frame["mean_unexposed"]]
    out[effect] = [format_interval(e, lo, hi, digits) if good else ""
                   for e, lo, hi, good in zip(frame["estimate"], frame["ci_low"], frame["ci_high"], ok)]
    out["p"] = [format_p(p, p_digits) if good else "" for p, good in zip(frame["p_value"], ok)]
    out["note"] = ["" if good else str(s) for s, good in zip(frame["status"], ok)]
    return out


def to_csv(analysis: Analysis, path: str | Path | None = None, *, style: str = "numbers",
           digits: int = 2) -> str:
    """The strata and overall rows as CSV text (written to ``path`` when given).

    Parameters
    ----------
    analysis : Analysis
    path : str or Path, optional
        File to write (UTF-8).
    style : {"numbers", "journal"}
        ``"numbers"``: :meth:`Analysis.to_frame` at full precision (for further computation; ``se`` of
        ratio measures is on the log scale). ``"journal"``: :func:`journal_table` strings.
    digits : int
        Decimals for ``style="journal"``.

    Returns
    -------
    str
        The CSV text.
    """
    if style == "numbers":
        frame = analysis.to_frame()
    elif style == "journal":
        frame = journal_table(analysis, digits=digits)
    else:
        from .errors import SpecError

        raise SpecError(f"The 'style' parameter must be one of 'numbers', 'journal'; got {style!r}.")
    text = frame.to_csv(index=False, lineterminator="\n")
    if path is not None:
        Path(path).write_text(text, encoding="utf-8")
    return text


def to_latex(analysis: Analysis, path: str | Path | None = None, *, digits: int = 2,
             caption: str | None = None, label: str | None = None, caution: bool = True) -> str:
    """A LaTeX ``table`` (booktabs rules) of :func:`journal_table`, every cell escaped for LaTeX.

    Parameters
    ----------
    analysis : Analysis
    path : str or Path, optional
        File to write (UTF-8).
    digits : int
        Decimals of means, estimates and interval limits.
    caption, label : str, optional
        ``\\caption`` as plain text (escaped; default: what was estimated, by which method) and
        ``\\label``.
    caution : bool
        Add the caution about subgroup findings as a table note.

    Returns
    -------
    str
        LaTeX source; needs ``\\usepackage{booktabs}``.
    """
    table = journal_table(analysis, digits=digits)
    spec = analysis.spec
    if caption is None:
        scale = " (ratio; interval from the log scale)" if spec.measure in RATIO else ""
        caption = (f"{MEASURE_NAMES.get(spec.measure, spec.measure).capitalize()}{scale} of "
                   f"{spec.exposure} on {spec.outcome} by stratum; method: {spec.method}.")
    n_left = max(1, len(analysis.modifiers))
    styler = table.style.hide(axis="index").format(_escape).format_index(_escape, axis=1)
    latex = styler.to_latex(
        hrules=True,
        caption=_escape(caption),
        label=label,
        position_float="centering",
        environment="table",
        column_format="l" * n_left + "r" * (table.shape[1] - n_left - 1) + "l",
    )
    if caution:
        latex = latex.replace("\\end{table}", "\\par\\footnotesize " + _escape(CAUTION) + "\n\\end{table}")
    if path is not None:
        Path(path).write_text(latex, encoding="utf-8")
    return latex


_LATEX_SPECIAL = {
    "\\": r"\textbackslash{}",
    "&": r"\&",
    "%": r"\%",
    "$": r"\$",
    "#": r"\#",
    "_": r"\_",
    "{": r"\{",
    "}": r"\}",
    "~": r"\textasciitilde{}",
    "^": r"\textasciicircum{}",
    "<": r"\textless{}",
    ">": r"\textgreater{}",
}


def _escape(text: str) -> str:
    return "".join(_LATEX_SPECIAL.get(ch, ch) for ch in str(text))
