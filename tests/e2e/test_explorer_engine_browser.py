"""The Explorer on a table that stays in DuckDB, in a real JupyterLab driven by headless chromium.

The notebook writes the demo data to a Parquet file in the server's folder and gives the Explorer
the file's path, so every drag issues aggregate queries in DuckDB. The test works the widget the way
a person would and compares what the page shows with ``stratagem.analyze`` run in this process on
the same file and Spec: the Effects table (Wald, then bootstrap intervals) and the Checks view's
engine rows (where the data lives, how many rows were scanned).
"""

from __future__ import annotations

import math
from functools import cache

import pytest

import stratagem as sg

from .helpers import (
    ROOT,
    cell_errors,
    chip,
    expected_rows,
    open_and_run,
    table_rows,
    to_json,
    wait_for_table,
    write_notebook,
)

pytestmark = pytest.mark.e2e

duckdb = pytest.importorskip("duckdb")

EXPOSURE, OUTCOME = "visited", "on_target"
CONFOUNDERS = ("age", "deprivation", "clinic_visits", "years_diagnosed", "district")
NUMERIC_FIELDS = ("estimate", "ci_low", "ci_high", "n", "n_exposed", "n_unexposed",
                  "mean_exposed", "mean_unexposed")
PARQUET = "demo.parquet"
SCANNED = "rows scanned in DuckDB (the data stays there)"
SCANS = "full scans in DuckDB"


@cache
def demo():
    return sg.demo_data()


def spec_fields(**more) -> dict:
    return dict(exposure=EXPOSURE, outcome=OUTCOME, confounders=CONFOUNDERS, method="aipw", **more)


CHECKS_JS = """(root) => {
    const pane = root.querySelector('.sg-checks');
    const rows = Array.from(pane.querySelectorAll('tbody tr'), (tr) => {
        const out = {warned: tr.classList.contains('sg-warning'), cells: {}};
        for (const td of tr.querySelectorAll('td[data-field]')) {
            out.cells[td.getAttribute('data-field')] = td.textContent;
        }
        return out;
    });
    const source = pane.querySelector('.sg-source');
    return {text: pane.innerText, hidden: pane.hidden, rows,
            source: source ? source.textContent : null,
            firstLine: (pane.querySelector('p') || {}).textContent || null};
}"""


def checks_view(root) -> dict:
    """The Checks view as shown: its visible text and each table row's cells (text) and warning style."""
    return root.evaluate(CHECKS_JS)


def engine_row(view: dict, check: str) -> dict:
    found = [r for r in view["rows"] if r["cells"].get("check") == check]
    assert len(found) == 1, f"the Checks view has {len(found)} rows {check!r}: {to_json(view['rows'][-4:])}"
    return found[0]


def test_explorer_on_parquet_in_duckdb(page, lab_server, artifacts):
    name = write_notebook(lab_server.root, "explorer_engine", [
        f"import stratagem as sg\nsg.demo_data().to_parquet({PARQUET!r})",
        f"explorer = sg.Explorer({PARQUET!r}, exposure={EXPOSURE!r}, outcome={OUTCOME!r},\n"
        f"                       confounders={CONFOUNDERS!r}, method='aipw')\nexplorer",
    ])
    open_and_run(page, lab_server, name, timeout=120_000)
    root = page.locator(ROOT).first
    try:
        root.locator(".sg-variables .sg-chip").first.wait_for(timeout=90_000)
    except Exception as exc:  # explain with the notebook's own error output
        raise AssertionError(f"the Explorer did not render; cell errors: {cell_errors(page)}; "
                             f"browser errors: {page.sg_console[-5:]}") from exc
    path = str(lab_server.root / PARQUET)  # the file the kernel wrote; analyze() reads it in DuckDB

    # 1. Drag lives_alone into "Stratify by": the numbers are those of analyze() on the same file.
    chip(page, "lives_alone").drag_to(root.locator(".sg-zone"))
    wald = sg.analyze(path, **spec_fields(strata=("lives_alone",)))
    assert wald.extra["engine"]["engine"] == "DuckDB", wald.extra
    want = expected_rows(wald)
    wait_for_table(page, want, fields=NUMERIC_FIELDS, timeout=90.0)
    wald_shown = {r["stratum"]: r["cells"] for r in table_rows(page)}
    scale = root.locator(".sg-scale").text_content()
    assert "Wald" in scale, scale
    # The engine gives the in-memory numbers (a sanity check of the file, not of the widget).
    memory = sg.analyze(demo(), **spec_fields(strata=("lives_alone",))).overall
    assert math.isclose(wald.overall["estimate"], memory["estimate"], abs_tol=1e-8)
    root.screenshot(path=str(artifacts / "explorer-engine-effects.png"))

    # 2. Checks: the data stayed in DuckDB; rows scanned and full scans are facts, not warnings.
    root.locator('[data-view="checks"]').click()
    root.locator(".sg-checks tbody tr").first.wait_for(timeout=30_000)
    view = checks_view(root)
    assert not view["hidden"], "the Checks view did not open"
    facts = wald.diagnostics.set_index("check")["value"]
    n_rows, n_scans = int(facts[SCANNED]), int(facts[SCANS])
    assert n_rows == len(demo()), facts[SCANNED]
    scanned, scans = engine_row(view, SCANNED), engine_row(view, SCANS)
    # The view formats counts with thousands separators and no decimals.
    assert scanned["cells"]["value"] == f"{n_rows:,}", scanned
    assert scans["cells"]["value"] == f"{n_scans:,}", scans
    for row in (scanned, scans):
        assert not row["warned"] and not row["cells"].get("warning"), f"an engine fact shown as a warning: {row}"
    assert "DuckDB" in view["text"] and f"{n_rows:,}" in view["text"], view["text"][:2000]
    # ...and the view says so first, in words, rather than only in the table's last rows.
    assert view["source"] is not None and view["firstLine"] == view["source"], view["firstLine"]
    assert "stayed in DuckDB" in view["source"], view["source"]
    assert f"{n_rows:,} rows scanned in {n_scans:,} full scan" in view["source"], view["source"]
    assert wald.extra["engine"] == {"engine": "DuckDB", "rows": n_rows, "scans": n_scans}, wald.extra
    warned_shown = sum(r["warned"] for r in view["rows"])
    warned_expected = int((wald.diagnostics["warning"] != "").sum())
    assert warned_shown == warned_expected, (warned_shown, warned_expected)
    # The checks table is taller than the window and the notebook clips what it scrolls: a tall
    # window for this one screenshot, so it shows every row down to the engine's.
    size = page.viewport_size
    page.set_viewport_size({"width": size["width"], "height": 2600})
    try:
        page.wait_for_timeout(300)  # JupyterLab lays out the taller window
        root.screenshot(path=str(artifacts / "explorer-engine-checks.png"))
    finally:
        page.set_viewport_size(size)
    print(f"\nChecks view: {len(view['rows'])} rows, {warned_shown} warned; "
          f"{SCANNED}: {scanned['cells']['value']}; {SCANS}: {scans['cells']['value']}")

    # 3. Bootstrap intervals (a Poisson bootstrap in DuckDB): the intervals change and still equal
    # analyze() for that Spec; the point estimates stay.
    root.locator('[data-view="effects"]').click()
    root.locator('select[data-control="interval"]').select_option("bootstrap")
    boot = sg.analyze(path, **spec_fields(strata=("lives_alone",), interval="bootstrap"))
    want_boot = expected_rows(boot)
    wait_for_table(page, want_boot, fields=NUMERIC_FIELDS, timeout=120.0)
    boot_shown = {r["stratum"]: r["cells"] for r in table_rows(page)}
    for stratum, cells in boot_shown.items():
        assert cells["estimate"]["value"] == wald_shown[stratum]["estimate"]["value"], stratum
        assert cells["ci_low"]["value"] != wald_shown[stratum]["ci_low"]["value"], (
            f"{stratum}: the interval did not change with the bootstrap")
    scale = root.locator(".sg-scale").text_content()
    assert "bootstrap" in scale, scale
    root.screenshot(path=str(artifacts / "explorer-engine-effects-bootstrap.png"))
    print(f"Wald vs bootstrap overall interval: ({wald.overall['ci_low']:.4f}, "
          f"{wald.overall['ci_high']:.4f}) vs ({boot.overall['ci_low']:.4f}, {boot.overall['ci_high']:.4f})")
