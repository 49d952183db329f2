"""Browser security of the Explorer: data never becomes markup, and nothing is loaded from the network.

The session's browser cannot reach any host but the loopback interface (see conftest.py); the
offline test also routes every non-loopback request through Playwright, aborts and counts it.
"""

from __future__ import annotations

import json

import pytest

import stratagem as sg

from .helpers import (
    NON_LOOPBACK,
    ROOT,
    cell_errors,
    chip,
    expected_rows,
    open_and_run,
    save_notebook,
    table_rows,
    wait_for_table,
    write_notebook,
)

pytestmark = pytest.mark.e2e

H1 = "<script>window.__sg_pwned=1</script>"
H2 = '<img src=x onerror="window.__sg_pwned=1">'
H3 = '"><svg onload="window.__sg_pwned=1">'

# The same code builds the table in the notebook and in this process.
HOSTILE_FRAME = f"""\
import stratagem as sg
H1, H2, H3 = {H1!r}, {H2!r}, {H3!r}
base = sg.demo_data()
df = base[["visited", "on_target", "age", "deprivation"]].copy()
df[H1] = base["lives_alone"].astype(str).map({{"no": H2, "yes": H3}})
df[H2] = base["insulin"].astype(str).map({{"no": H1, "yes": "plain"}})
df[H3] = base["sex"].astype(str).map({{"female": H3, "male": H1}})
"""

FIELDS = dict(exposure="visited", outcome="on_target", confounders=("age", "deprivation"),
              method="crude", measure="rd")


def hostile_frame():
    namespace: dict = {}
    exec(HOSTILE_FRAME, namespace)  # a constant of this file, shared verbatim with the notebook
    return namespace["df"]


def pwned(page):
    return page.evaluate("() => window.__sg_pwned")


def assert_inert(page):
    """No script ran, and the widget holds no script, img, or on* attribute."""
    page.wait_for_timeout(300)  # give an injected onerror/onload the chance to fire
    assert pwned(page) is None, "a data string ran as code in the page"
    found = page.evaluate(
        """(sel) => Array.from(document.querySelectorAll(sel + ' *')).filter((e) =>
            ['SCRIPT', 'IMG', 'IFRAME', 'OBJECT', 'EMBED'].includes(e.tagName.toUpperCase()) ||
            Array.from(e.attributes).some((a) => a.name.toLowerCase().startsWith('on'))
        ).map((e) => e.outerHTML.slice(0, 200))""",
        ROOT,
    )
    assert found == [], f"markup from the data inside the widget: {found}"


def test_hostile_names_and_levels_stay_text(page, lab_server, artifacts):
    df = hostile_frame()
    name = write_notebook(lab_server.root, "explorer_hostile", [
        HOSTILE_FRAME,
        f"explorer = sg.Explorer(df, **{FIELDS!r})\nexplorer",
    ])
    open_and_run(page, lab_server, name)
    root = page.locator(ROOT).first
    try:
        chip(page, H1).wait_for(timeout=90_000)
    except Exception as exc:
        raise AssertionError(f"no chip for the hostile column; cell errors: {cell_errors(page)}; "
                             f"browser errors: {page.sg_console[-5:]}") from exc
    assert_inert(page)
    for column in (H1, H2, H3):
        text = chip(page, column).text_content()
        assert column in text, f"chip text {text!r} does not show {column!r} literally"

    chip(page, H1).drag_to(root.locator(".sg-zone"))
    chip(page, H2).focus()
    page.keyboard.press("Enter")
    analysis = sg.analyze(df, strata=(H1, H2), **FIELDS)
    want = expected_rows(analysis)
    wait_for_table(page, want)
    assert_inert(page)
    zone_text = root.locator(".sg-zone").text_content()
    assert H1 in zone_text and H2 in zone_text, zone_text
    rows = {r["stratum"]: r["text"] for r in table_rows(page)}
    for _, row in analysis.strata.iterrows():
        for level in (row[H1], row[H2]):
            assert level in rows[row["stratum"]], f"row text {rows[row['stratum']]!r} lacks {level!r}"
    plot_text = root.locator("svg.sg-forest").text_content()
    assert H2 in plot_text or H3 in plot_text, "the plot's labels do not show the levels literally"
    root.screenshot(path=str(artifacts / "explorer-hostile.png"))

    root.locator('[data-view="code"]').click()
    code = root.locator("pre.sg-code").text_content()
    assert repr(H1) in code or json.dumps(H1) in code, code
    for view in ("types", "checks", "effects"):
        root.locator(f'[data-view="{view}"]').click()
        assert_inert(page)

    # The saved static snapshot escapes the same strings, and rendering it runs nothing.
    path = lab_server.root / name
    html = ""
    for _ in range(40):
        save_notebook(page)
        page.wait_for_timeout(250)
        outputs = [o for c in json.loads(path.read_text())["cells"] for o in c.get("outputs", [])]
        htmls = ["".join(o["data"]["text/html"]) for o in outputs if "text/html" in o.get("data", {})]
        html = next((h for h in htmls if "sg-" in h), "")
        if "&lt;script&gt;" in html and all(lab in html for lab in ("plain",)):
            break
    assert html, "the saved notebook has no text/html snapshot of the Explorer"
    for raw in ("<script>window", "<img src=x", "<svg onload", '"><svg'):
        assert raw not in html, f"unescaped {raw!r} in the saved snapshot"
    assert "&lt;script&gt;window.__sg_pwned=1&lt;/script&gt;" in html
    snap = page.context.new_page()
    try:
        snap.set_content(html)
        snap.wait_for_timeout(300)
        assert snap.evaluate("() => window.__sg_pwned") is None, "the saved snapshot ran a script"
        assert H1 in snap.locator("body").text_content()
    finally:
        snap.close()


def test_renders_fully_with_the_network_blocked(page, lab_server, network_log):
    """Playwright aborts every request to a non-loopback host (and counts them); the widget still
    renders fully and attempted none."""
    routed: list[str] = []

    def abort(route, request):
        routed.append(request.url)
        route.abort("blockedbyclient")

    page.route(NON_LOOPBACK, abort)
    mark = network_log.mark()
    name = write_notebook(lab_server.root, "explorer_offline", [
        "import stratagem as sg\ndf = sg.demo_data()",
        "explorer = sg.Explorer(df, exposure='visited', outcome='on_target', "
        "confounders=('age', 'deprivation'), strata=('lives_alone',), method='crude')\nexplorer",
    ])
    open_and_run(page, lab_server, name)
    root = page.locator(ROOT).first
    root.locator(".sg-variables .sg-chip").first.wait_for(timeout=90_000)
    analysis = sg.analyze(sg.demo_data(), exposure="visited", outcome="on_target",
                          confounders=("age", "deprivation"), strata=("lives_alone",), method="crude")
    wait_for_table(page, expected_rows(analysis))
    assert root.locator("svg.sg-forest g.sg-row[data-stratum]").count() == len(analysis.strata) + 1
    assert root.locator("svg.sg-forest line.sg-null").count() == 1
    box = root.locator("svg.sg-forest").bounding_box()
    assert box and box["width"] > 100 and box["height"] > 40, box
    # The scoped stylesheet arrived (from the kernel, not a CDN): the zone is laid out by it.
    styled = root.evaluate("(r) => getComputedStyle(r.querySelector('.sg-zone')).borderStyle")
    assert styled not in ("", "none"), f"the widget's CSS did not apply (zone border: {styled!r})"
    for view in ("types", "checks", "code", "effects"):
        page.locator(ROOT).first.locator(f'[data-view="{view}"]').click()
    page.wait_for_timeout(500)
    attempted = sorted(set(routed + network_log.since(mark)))
    print(f"\nrequests to non-loopback hosts while the Explorer rendered: {len(attempted)}")
    assert attempted == [], f"requests to non-loopback hosts: {attempted}"

    # Positive control: the route does see, count and abort a request to the outside world.
    outcome = page.evaluate(
        "() => fetch('http://192.0.2.1/sg-probe').then(() => 'loaded', () => 'blocked')")
    assert outcome == "blocked"
    assert routed == ["http://192.0.2.1/sg-probe"]
