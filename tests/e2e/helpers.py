"""Helpers for the browser tests: write a notebook, open and run it, read what the Explorer shows."""

from __future__ import annotations

import json
import math
import re
import time
from pathlib import Path
from urllib.parse import urlsplit

import nbformat

ROOT = ".sg-explorer"
LOOPBACK_HOSTS = {"127.0.0.1", "localhost", "::1", "[::1]"}


def is_loopback(url: str) -> bool:
    parts = urlsplit(url)
    if parts.scheme in ("data", "blob", "about", "chrome", "chrome-extension", "devtools"):
        return True
    return (parts.hostname or "") in LOOPBACK_HOSTS


# Every http(s)/ws(s) URL whose host is not the loopback interface (matched inside Playwright's
# driver, so loopback requests never make a round trip to this process).
NON_LOOPBACK = re.compile(r"^(?!(?:https?|wss?)://(?:127\.0\.0\.1|localhost|\[::1\])(?::\d+)?(?:/|$))[a-z]+://")


def write_notebook(folder: Path, name: str, cells: list[str]) -> str:
    """Write code cells as a notebook into the server's root folder; return its file name."""
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(src) for src in cells]
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    path = folder / f"{name}.ipynb"
    nbformat.write(nb, path)
    return path.name


def open_and_run(page, server, notebook: str, *, timeout: float = 90_000) -> None:
    """Open the notebook in the session's JupyterLab, wait for its kernel, then run every cell.

    The commands' results (widgets) are not returned to Python: serialising a widget can fail with
    "object reference chain is too long".

    Waits for the session to be ready and the kernel idle before running: the toolbar's indicator
    says idle before the kernel session exists, and "run all" would then open a kernel picker.
    """
    page.evaluate("async (path) => { await window.jupyterapp.commands.execute('docmanager:open', "
                  "{path, factory: 'Notebook'}); return null; }", notebook)
    page.wait_for_function(
        """(name) => {
            const w = window.jupyterapp.shell.currentWidget;
            if (!w || !w.sessionContext || !w.context || w.context.path !== name) return false;
            const s = w.sessionContext;
            return s.isReady && s.session && s.session.kernel && s.session.kernel.status === 'idle';
        }""",
        arg=notebook,
        timeout=timeout,
    )
    page.evaluate("async () => { await window.jupyterapp.commands.execute('notebook:run-all-cells'); "
                  "return null; }")


def wait_cells_done(page, *, timeout: float = 120_000) -> None:
    """Wait until no cell is queued or running and the kernel is idle again."""
    page.wait_for_function(
        """() => {
            const w = window.jupyterapp.shell.currentWidget;
            const k = w.sessionContext.session && w.sessionContext.session.kernel;
            const busy = document.querySelectorAll('.jp-InputPrompt');
            for (const p of busy) { if (p.textContent.includes('*')) return false; }
            return k && k.status === 'idle';
        }""",
        timeout=timeout,
    )


def cell_errors(page) -> list[str]:
    """Texts of error outputs in the notebook (a failing cell explains itself)."""
    return page.eval_on_selector_all(
        ".jp-OutputArea-output[data-mime-type='application/vnd.jupyter.stderr'], "
        ".jp-RenderedText[data-mime-type='application/vnd.jupyter.error']",
        "els => els.map(e => e.textContent.slice(-1500))",
    )


def save_notebook(page) -> None:
    page.evaluate("async () => { await window.jupyterapp.commands.execute('docmanager:save'); return null; }")


def css_string(value: str) -> str:
    """A CSS string literal for an attribute selector, whatever characters the value holds."""
    return '"' + value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\a ") + '"'


def chip(page, column: str, where: str = ".sg-variables", nth: int = 0):
    return page.locator(ROOT).nth(nth).locator(f"{where} .sg-chip[data-column={css_string(column)}]")


TABLE_JS = """(root) => {
    const rows = root.querySelectorAll('.sg-effects table tbody tr[data-stratum]');
    return Array.from(rows, (tr) => {
        const out = {stratum: tr.getAttribute('data-stratum'), text: tr.textContent, cells: {}};
        for (const td of tr.querySelectorAll('td[data-field]')) {
            out.cells[td.getAttribute('data-field')] = {
                value: td.getAttribute('data-value'), text: td.textContent };
        }
        return out;
    });
}"""


def table_rows(page, nth: int = 0) -> list[dict]:
    """The effects table as shown: stratum label, row text and each cell's data-value and text."""
    return page.locator(ROOT).nth(nth).evaluate(TABLE_JS)


def expected_rows(analysis) -> dict[str, dict[str, float]]:
    """stratum label -> the numbers analyze() gives, keyed by the table's data-field names."""
    fields = ("estimate", "ci_low", "ci_high", "n", "n_exposed", "n_unexposed",
              "mean_exposed", "mean_unexposed")
    out = {}
    for _, row in analysis.strata.iterrows():
        out[str(row["stratum"])] = {f: float(row[f]) for f in fields} | {"status": row["status"]}
    overall = analysis.overall
    out["overall"] = {f: float(overall[f]) for f in fields if f in overall.index}
    return out


def _number(value) -> float:
    if value is None or value == "" or value.lower() in ("nan", "null", "none"):
        return math.nan
    return float(value)


def mismatches(shown: list[dict], expected: dict, fields=("estimate", "ci_low", "ci_high"),
               tol: float = 1e-9) -> list[str]:
    """Differences between the table on screen and analyze(); empty when they agree."""
    problems = []
    labels = [r["stratum"] for r in shown]
    if sorted(labels) != sorted(expected):
        return [f"rows {labels} != expected {sorted(expected)}"]
    if labels[-1] != "overall":
        problems.append(f"the overall row is not last: {labels}")
    for row in shown:
        want = expected[row["stratum"]]
        for f in fields:
            if f not in want:
                continue
            cell = row["cells"].get(f)
            if cell is None:
                problems.append(f"{row['stratum']}: no cell td[data-field={f}]")
                continue
            got, exp = _number(cell["value"]), want[f]
            if math.isnan(exp) and math.isnan(got):
                continue
            if not math.isclose(got, exp, rel_tol=tol, abs_tol=tol):
                problems.append(f"{row['stratum']}.{f}: shown {cell['value']!r}, analyze() {exp!r}")
    return problems


def wait_for_table(page, expected: dict, *, nth: int = 0, fields=("estimate", "ci_low", "ci_high"),
                   timeout: float = 30.0) -> list[dict]:
    """Poll until the table shows exactly the numbers of ``expected``; fail with the differences."""
    deadline = time.monotonic() + timeout
    problems = ["the effects table never appeared"]
    while time.monotonic() < deadline:
        try:
            shown = table_rows(page, nth)
        except Exception:  # noqa: BLE001 - the widget may be re-rendering
            shown = []
        if shown:
            problems = mismatches(shown, expected, fields)
            if not problems:
                return shown
        page.wait_for_timeout(100)
    status = page.locator(ROOT).nth(nth).locator(".sg-message").all_text_contents()
    raise AssertionError(
        "the Explorer's table did not match analyze():\n  " + "\n  ".join(problems[:12])
        + f"\nwidget message: {status}\nbrowser errors: {getattr(page, 'sg_console', [])[-5:]}"
    )


FOREST_JS = """(root) => {
    const svg = root.querySelector('svg.sg-forest');
    if (!svg) return null;
    const toSvg = (el, x, y) => {
        const p = svg.createSVGPoint(); p.x = x; p.y = y;
        const m = el.getCTM(), top = svg.getCTM();
        return p.matrixTransform(top.inverse().multiply(m));
    };
    const centre = (el) => {
        const b = el.getBBox();
        return toSvg(el, b.x + b.width / 2, b.y + b.height / 2).x;
    };
    const lineX = (el) => [toSvg(el, el.x1.baseVal.value, el.y1.baseVal.value).x,
                           toSvg(el, el.x2.baseVal.value, el.y2.baseVal.value).x];
    const nul = svg.querySelector('line.sg-null');
    const rows = Array.from(svg.querySelectorAll('g.sg-row[data-stratum]'), (g) => {
        const ci = g.querySelector('line.sg-ci'), pt = g.querySelector('.sg-point');
        const reason = g.querySelector('text.sg-reason');
        return {stratum: g.getAttribute('data-stratum'),
                point: pt ? centre(pt) : null,
                ci: ci ? lineX(ci).sort((a, b) => a - b) : null,
                reason: reason ? reason.textContent : null};
    });
    return {null: nul ? lineX(nul) : null, rows, width: svg.getBoundingClientRect().width};
}"""


def forest(page, nth: int = 0) -> dict | None:
    """Horizontal positions (SVG user units) of the plot's points, interval ends and null line."""
    return page.locator(ROOT).nth(nth).evaluate(FOREST_JS)


def axis_fit(plot: dict, expected: dict, log: bool) -> dict:
    """Fit x = a + b * t(value) through every drawn point and interval end (t = log for ratios).

    Returns the fit's largest residual (px) and where value = 0 (differences) or 1 (ratios) falls.
    """
    xs, ts = [], []
    for row in plot["rows"]:
        want = expected[row["stratum"]]
        pairs = []
        if row["point"] is not None:
            pairs.append((row["point"], want["estimate"]))
        if row["ci"] is not None:
            pairs += [(row["ci"][0], want["ci_low"]), (row["ci"][1], want["ci_high"])]
        for x, v in pairs:
            if math.isfinite(v) and (v > 0 or not log):
                xs.append(x)
                ts.append(math.log(v) if log else v)
    n = len(xs)
    mt, mx = sum(ts) / n, sum(xs) / n
    b = sum((t - mt) * (x - mx) for t, x in zip(ts, xs)) / sum((t - mt) ** 2 for t in ts)
    a = mx - b * mt
    resid = max(abs(x - (a + b * t)) for t, x in zip(ts, xs))
    return {"n": n, "slope": b, "max_residual": resid, "null_expected_at": a}


def to_json(obj) -> str:
    return json.dumps(obj, indent=1, default=str)
