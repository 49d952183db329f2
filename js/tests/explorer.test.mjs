// Unit tests of js/explorer.js against jsdom and a fake model (node --test).
import { test, beforeEach } from "node:test";
import assert from "node:assert/strict";
import { installDom, fakeModel, baseState, result, row, dragEvent } from "./helpers.mjs";

installDom();
const { default: widget, axis, niceTicks, placeColumn, shiftColumn, fmtCheck, HEAD_H, ROW_H } = await import("../explorer.js");

let el;
beforeEach(() => {
  document.body.replaceChildren();
  el = document.createElement("div");
  document.body.append(el);
});

function mount(state = {}) {
  const model = fakeModel(baseState(state));
  const cleanup = widget.render({ model, el });
  return { model, cleanup, root: el.querySelector(".sg-explorer") };
}

const HOSTILE = "<img src=x onerror=alert(1)>";

test("chips render for every variable; unusable ones are disabled with the reason", () => {
  const { root } = mount();
  const chips = root.querySelectorAll(".sg-variables .sg-chip[data-column]");
  assert.deepEqual([...chips].map((c) => c.getAttribute("data-column")), ["sex", "age", "insulin", "id"]);
  const sex = root.querySelector('.sg-variables .sg-chip[data-column="sex"]');
  assert.equal(sex.getAttribute("draggable"), "true");
  assert.equal(sex.getAttribute("tabindex"), "0");
  assert.equal(sex.querySelector(".sg-tag").textContent, "2 levels");
  const id = root.querySelector('.sg-variables .sg-chip[data-column="id"]');
  assert.equal(id.getAttribute("aria-disabled"), "true");
  assert.match(id.getAttribute("title"), /4000 levels/);
  assert.equal(id.querySelector(".sg-add").disabled, true);
  assert.equal(root.querySelector(".sg-zone .sg-chip"), null);
});

test("drop on the zone appends the column and saves", () => {
  const { model, root } = mount();
  const zone = root.querySelector(".sg-zone");
  const over = dragEvent("dragover");
  zone.dispatchEvent(over);
  assert.equal(over.defaultPrevented, true, "dragover must be cancelled so drop is allowed");
  zone.dispatchEvent(dragEvent("drop", { "text/plain": "sex" }));
  assert.deepEqual(model.get("strata"), ["sex"]);
  assert.ok(model.log.saves >= 1);
  zone.dispatchEvent(dragEvent("drop", { "application/x-stratagem-column": "insulin" }));
  assert.deepEqual(model.get("strata"), ["sex", "insulin"]);
  const zoneChips = [...root.querySelectorAll(".sg-zone .sg-chip")].map((c) => c.getAttribute("data-column"));
  assert.deepEqual(zoneChips, ["sex", "insulin"]);
  assert.ok(root.querySelector('.sg-zone .sg-chip[data-column="sex"] .sg-remove'));
});

test("dragstart puts the column name on the dataTransfer", () => {
  const { root } = mount();
  const chip = root.querySelector('.sg-variables .sg-chip[data-column="age"]');
  const start = dragEvent("dragstart");
  chip.dispatchEvent(start);
  assert.equal(start.dataTransfer.store["text/plain"], "age");
  assert.equal(start.dataTransfer.store["application/x-stratagem-column"], "age");
});

test("dropping a disabled or unknown column does nothing", () => {
  const { model, root } = mount();
  const zone = root.querySelector(".sg-zone");
  zone.dispatchEvent(dragEvent("drop", { "text/plain": "id" }));
  zone.dispatchEvent(dragEvent("drop", { "text/plain": "not-a-column" }));
  assert.deepEqual(model.get("strata"), []);
  assert.equal(model.log.saves, 0);
});

test("dropping a zone chip on another reorders (nesting order)", () => {
  const { model, root } = mount({ strata: ["sex", "age", "insulin"] });
  const target = root.querySelector('.sg-zone .sg-chip[data-column="sex"] .sg-name');
  target.dispatchEvent(dragEvent("drop", { "text/plain": "insulin" }));
  assert.deepEqual(model.get("strata"), ["insulin", "sex", "age"]);
});

test("placeColumn and shiftColumn", () => {
  assert.deepEqual(placeColumn(["a", "b", "c"], "a", "c"), ["b", "c", "a"]);
  assert.deepEqual(placeColumn(["a", "b", "c"], "c", "a"), ["c", "a", "b"]);
  assert.deepEqual(placeColumn(["a", "b"], "x", "b"), ["a", "x", "b"]);
  assert.deepEqual(placeColumn(["a", "b"], "x", null), ["a", "b", "x"]);
  assert.deepEqual(placeColumn(["a", "b"], "a", null), ["b", "a"]);
  assert.deepEqual(placeColumn(["a", "b"], "a", "a"), ["a", "b"]);
  assert.deepEqual(shiftColumn(["a", "b", "c"], "b", -1), ["b", "a", "c"]);
  assert.deepEqual(shiftColumn(["a", "b", "c"], "c", 1), ["a", "b", "c"]);
});

test("keyboard: Enter and the add button add; Delete, Backspace and the × remove", () => {
  const { model, root } = mount();
  const sex = root.querySelector('.sg-variables .sg-chip[data-column="sex"]');
  sex.dispatchEvent(new KeyboardEvent("keydown", { key: "Enter", bubbles: true }));
  assert.deepEqual(model.get("strata"), ["sex"]);
  root.querySelector('.sg-variables .sg-chip[data-column="insulin"] .sg-add').click();
  assert.deepEqual(model.get("strata"), ["sex", "insulin"]);
  // Adding again does not duplicate; the chip shows it is in use.
  root.querySelector('.sg-variables .sg-chip[data-column="sex"]').dispatchEvent(
    new KeyboardEvent("keydown", { key: "Enter", bubbles: true }));
  assert.deepEqual(model.get("strata"), ["sex", "insulin"]);
  assert.ok(root.querySelector('.sg-variables .sg-chip[data-column="sex"]').classList.contains("sg-used"));
  const zoneSex = root.querySelector('.sg-zone .sg-chip[data-column="sex"]');
  zoneSex.dispatchEvent(new KeyboardEvent("keydown", { key: "Delete", bubbles: true }));
  assert.deepEqual(model.get("strata"), ["insulin"]);
  root.querySelector('.sg-zone .sg-chip[data-column="insulin"]').dispatchEvent(
    new KeyboardEvent("keydown", { key: "Backspace", bubbles: true }));
  assert.deepEqual(model.get("strata"), []);
  root.querySelector('.sg-variables .sg-chip[data-column="age"] .sg-add').click();
  root.querySelector('.sg-zone .sg-chip[data-column="age"] .sg-remove').click();
  assert.deepEqual(model.get("strata"), []);
});

test("Alt+arrows reorder a zone chip", () => {
  const { model, root } = mount({ strata: ["sex", "insulin"] });
  root.querySelector('.sg-zone .sg-chip[data-column="insulin"]').dispatchEvent(
    new KeyboardEvent("keydown", { key: "ArrowLeft", altKey: true, bubbles: true }));
  assert.deepEqual(model.get("strata"), ["insulin", "sex"]);
});

test("numeric chips in the zone carry a bin count that writes bins; removing drops their bins", () => {
  const { model, root } = mount({ strata: ["age", "sex"], bins: { age: 3 } });
  const input = root.querySelector('.sg-zone .sg-chip[data-column="age"] .sg-bins');
  assert.equal(input.value, "3");
  assert.equal(root.querySelector('.sg-zone .sg-chip[data-column="sex"] .sg-bins'), null);
  input.value = "5";
  input.dispatchEvent(new Event("change", { bubbles: true }));
  assert.deepEqual(model.get("bins"), { age: 5 });
  root.querySelector('.sg-zone .sg-chip[data-column="age"] .sg-remove').click();
  assert.deepEqual(model.get("strata"), ["sex"]);
  assert.deepEqual(model.get("bins"), {});
});

test("Python writing strata redraws the zone (two-way sync)", () => {
  const { model, root } = mount();
  model.put("strata", ["insulin", "sex"]);
  const zoneChips = [...root.querySelectorAll(".sg-zone .sg-chip")].map((c) => c.getAttribute("data-column"));
  assert.deepEqual(zoneChips, ["insulin", "sex"]);
});

test("effects table: one row per stratum, overall last, data-value at full precision", () => {
  const rows = [
    row("sex=female", { estimate: 0.3300069833397466, ci_low: 0.2888152667556416 }),
    row("sex=male", { estimate: 0.27, status: "ok" }),
    row("overall", { estimate: 0.3048, n: 4000 }),
  ];
  const { root } = mount({ _result: result(rows, { modifiers: ["sex"] }) });
  const trs = [...root.querySelectorAll(".sg-effects table tbody tr")];
  assert.deepEqual(trs.map((t) => t.getAttribute("data-stratum")), ["sex=female", "sex=male", "overall"]);
  const est = trs[0].querySelector('td[data-field="estimate"]');
  assert.equal(Number(est.getAttribute("data-value")), 0.3300069833397466);
  assert.equal(est.textContent, "0.330");
  assert.equal(trs[2].querySelector('td[data-field="n"]').textContent, "4,000");
  for (const f of ["n", "n_exposed", "n_unexposed", "mean_exposed", "mean_unexposed", "estimate", "ci_low", "ci_high", "status"]) {
    assert.ok(trs[0].querySelector(`td[data-field="${f}"]`), `cell ${f}`);
  }
});

test("a not-estimable row shows its reason instead of a point", () => {
  const rows = [
    row("a", { estimate: null, ci_low: null, ci_high: null, status: "no exposed rows in this stratum" }),
    row("overall"),
  ];
  const { root } = mount({ _result: result(rows, { modifiers: ["g"] }) });
  const g = root.querySelector('svg.sg-forest g.sg-row[data-stratum="a"]');
  assert.equal(g.querySelector(".sg-point"), null);
  assert.equal(g.querySelector("text.sg-reason").textContent, "no exposed rows in this stratum");
  assert.equal(root.querySelector('tr[data-stratum="a"] td[data-field="estimate"]').getAttribute("data-value"), "");
});

test("plot geometry: difference axis is linear with the null line at 0", () => {
  const rows = [row("a", { estimate: 0.2, ci_low: 0.1, ci_high: 0.3 }), row("overall", { estimate: -0.1, ci_low: -0.2, ci_high: 0 })];
  const ax = axis(rows, false, 0, 10, 290);
  const span = 0.3 - -0.2;
  assert.ok(Math.abs(ax.domain[0] - (-0.2 - 0.05 * span)) < 1e-12);
  assert.ok(Math.abs(ax.domain[1] - (0.3 + 0.05 * span)) < 1e-12);
  // linear: equal steps in value are equal steps in pixels
  assert.ok(Math.abs(ax.x(0.1) - ax.x(0) - (ax.x(0.2) - ax.x(0.1))) < 1e-9);
  const { root } = mount({ _result: result(rows) });
  const svg = root.querySelector("svg.sg-forest");
  const nullLine = svg.querySelector("line.sg-null");
  const w = Number(svg.getAttribute("width"));
  const expected = axis(rows, false, 0, 10, w - 10).x(0);
  assert.ok(Math.abs(Number(nullLine.getAttribute("x1")) - expected) < 1e-9);
  // each row's point sits at its estimate, rows are ROW_H apart below the header
  const gs = svg.querySelectorAll("g.sg-row");
  assert.equal(gs.length, 2);
  const c = gs[0].querySelector("circle.sg-point");
  assert.ok(Math.abs(Number(c.getAttribute("cx")) - axis(rows, false, 0, 10, w - 10).x(0.2)) < 1e-9);
  assert.equal(Number(c.getAttribute("cy")), HEAD_H + ROW_H / 2);
  const ci = gs[0].querySelector("line.sg-ci");
  assert.ok(Number(ci.getAttribute("x1")) < Number(ci.getAttribute("x2")));
});

test("plot geometry: ratio axis is logarithmic with the null line at 1", () => {
  const rows = [row("a", { estimate: 2, ci_low: 1, ci_high: 4 }), row("overall", { estimate: 0.5, ci_low: 0.25, ci_high: 1 })];
  const ax = axis(rows, true, 1, 0, 100);
  // log: doubling is the same distance everywhere, and 1 sits midway between 0.5 and 2
  assert.ok(Math.abs(ax.x(2) - ax.x(1) - (ax.x(4) - ax.x(2))) < 1e-9);
  assert.ok(Math.abs(ax.x(1) - (ax.x(0.5) + ax.x(2)) / 2) < 1e-9);
  assert.ok(ax.ticks.includes(1) && ax.ticks.includes(2) && ax.ticks.includes(0.5));
  const { root } = mount({ _result: result(rows, { measure: "rr", measure_name: "risk ratio", ratio: true, null: 1 }) });
  const svg = root.querySelector("svg.sg-forest");
  const w = Number(svg.getAttribute("width"));
  const x1 = Number(svg.querySelector("line.sg-null").getAttribute("x1"));
  assert.ok(Math.abs(x1 - axis(rows, true, 1, 10, w - 10).x(1)) < 1e-9);
  assert.match(svg.querySelector(".sg-axis-title").textContent, /log scale/);
  assert.match(root.querySelector("svg.sg-axis .sg-axis-title").textContent, /log scale/);
  // the plot is one cell spanning every body row, so plot rows and table rows line up
  const cell = root.querySelector(".sg-effects tbody td.sg-plot-cell");
  assert.equal(cell.getAttribute("rowspan"), "2");
  assert.equal(Number(svg.getAttribute("height")), 2 * ROW_H);
});

test("niceTicks uses steps of 1, 2 or 5", () => {
  assert.deepEqual(niceTicks(0, 1), [0, 0.2, 0.4, 0.6, 0.8, 1]);
  assert.deepEqual(niceTicks(-0.23, 0.41), [-0.2, 0, 0.2, 0.4]);
  assert.deepEqual(niceTicks(-0.05, 0.42), [0, 0.1, 0.2, 0.3, 0.4]);
  assert.deepEqual(niceTicks(1, 1), []);
});

test("escaping: a hostile column name and level appear as text, no element is created", () => {
  const variables = [{ name: HOSTILE, tag: "2 levels", ok: true, reason: "", kind: "levels" }];
  const label = `${HOSTILE}=<b>x</b>`;
  const rows = [row(label), row("overall")];
  const { root, model } = mount({
    _variables: variables,
    strata: [HOSTILE],
    _result: result(rows, {
      modifiers: [HOSTILE],
      rows: [row(label, { levels: { [HOSTILE]: "<b>x</b>" } }), row("overall")],
      notes: [`note ${HOSTILE}`],
      diagnostics: [{ stratum: label, check: "positivity", arm: "exposed", value: 0.1, warning: HOSTILE }],
      response_types: [{ stratum: label, type: "causal", lower: 0.1, upper: 0.2 }],
    }),
    _status: { state: "error", message: HOSTILE, progress: 0 },
  });
  assert.equal(root.querySelectorAll("img").length, 0);
  assert.equal(root.querySelectorAll("b").length, 0);
  const chip = root.querySelector(".sg-variables .sg-chip");
  assert.equal(chip.getAttribute("data-column"), HOSTILE);
  assert.equal(chip.querySelector(".sg-name").textContent, HOSTILE);
  assert.equal(root.querySelector(".sg-zone .sg-chip .sg-name").textContent, HOSTILE);
  const first = root.querySelector('.sg-effects tbody tr td[data-field="stratum"]');
  assert.equal(first.getAttribute("title"), label);
  assert.equal(first.textContent, "<b>x</b>"); // the level, as text
  assert.equal(root.querySelector(".sg-effects thead th").textContent, HOSTILE);
  assert.equal(root.querySelector(".sg-message").textContent, HOSTILE);
  assert.ok(root.textContent.includes(`note ${HOSTILE}`));
  // querying by the attribute value finds the row: the label was stored verbatim
  const tr = [...root.querySelectorAll(".sg-effects tbody tr")].find((t) => t.getAttribute("data-stratum") === label);
  assert.ok(tr);
  // hidden views are drawn when shown: show them, then look again
  root.querySelector('[data-view="types"]').click();
  assert.equal(root.querySelector(".sg-types tbody td").textContent, label);
  root.querySelector('[data-view="checks"]').click();
  assert.ok(root.querySelector(".sg-checks").textContent.includes(HOSTILE));
  assert.equal(root.querySelectorAll("img").length, 0);
  assert.equal(root.querySelectorAll("b").length, 0);
  model.put("_result", result([row(HOSTILE)], { recipe: HOSTILE }));
  assert.equal(root.querySelector("pre.sg-code").textContent, HOSTILE);
  assert.equal(root.querySelectorAll("img").length, 0);
});

test("controls write their traits; n_boot only with bootstrap", () => {
  const { model, root } = mount();
  const measure = root.querySelector('select[data-control="measure"]');
  assert.deepEqual([...measure.options].map((o) => o.value), ["rd", "rr", "or"]);
  measure.value = "rr";
  measure.dispatchEvent(new Event("change"));
  assert.equal(model.get("measure"), "rr");
  const method = root.querySelector('select[data-control="method"]');
  assert.equal(method.value, "crude");
  method.value = "aipw";
  method.dispatchEvent(new Event("change"));
  assert.equal(model.get("method"), "aipw");
  const level = root.querySelector('[data-control="level"]');
  level.value = "0.9";
  level.dispatchEvent(new Event("change"));
  assert.equal(model.get("level"), 0.9);
  const nBoot = root.querySelector('[data-control="n_boot"]');
  assert.equal(nBoot.disabled, true);
  const interval = root.querySelector('select[data-control="interval"]');
  interval.value = "bootstrap";
  interval.dispatchEvent(new Event("change"));
  assert.equal(model.get("interval"), "bootstrap");
  assert.equal(nBoot.disabled, false);
  nBoot.value = "200";
  nBoot.dispatchEvent(new Event("change"));
  assert.equal(model.get("n_boot"), 200);
});

test("a numeric outcome offers the mean difference only", () => {
  const { root } = mount({ _result: result([row("overall")], { spec: { method: "crude", measure: "md" }, measure: "md" }) });
  const measure = root.querySelector('select[data-control="measure"]');
  assert.deepEqual([...measure.options].map((o) => o.value), ["md"]);
});

test("status: error dims the last result and shows the message; running shows progress", () => {
  const { model, root } = mount({ _result: result([row("a"), row("overall")], { modifiers: ["g"] }) });
  model.put("_status", { state: "error", message: "Modifier 'age' has too few values", progress: 0 });
  assert.ok(root.classList.contains("sg-stale"));
  assert.equal(root.querySelector(".sg-message").textContent, "Modifier 'age' has too few values");
  assert.equal(root.querySelectorAll(".sg-effects tbody tr").length, 2, "last result stays");
  model.put("_status", { state: "running", message: "", progress: 0.4 });
  assert.ok(!root.classList.contains("sg-stale"));
  const bar = root.querySelector("progress.sg-progress");
  assert.equal(bar.hidden, false);
  assert.equal(bar.value, 0.4);
  model.put("_status", { state: "idle", message: "", progress: 1 });
  assert.equal(bar.hidden, true);
});

test("views switch; types, checks and code show their tables", () => {
  const types = [];
  for (const t of ["doomed", "causal", "preventive", "immune"]) types.push({ stratum: "overall", type: t, lower: 0.25, upper: 0.25 });
  const { root } = mount({
    _result: result([row("overall")], {
      response_types: types,
      diagnostics: [{ stratum: "overall", check: "positivity", arm: "exposed", value: 0.01, warning: "few exposed" }],
      heterogeneity: [{ test: "Cochran Q", statistic: 3.2, df: 1, p_value: 0.07, note: "" }],
      modifiers: ["sex"],
      recipe: "import stratagem as sg\nanalysis = sg.analyze(df)\n",
    }),
  });
  const pane = (k) => root.querySelector(`[data-pane="${k}"]`);
  assert.equal(pane("effects").hidden, false);
  assert.equal(pane("types").hidden, true);
  root.querySelector('[data-view="types"]').click();
  assert.equal(pane("types").hidden, false);
  assert.equal(pane("effects").hidden, true);
  assert.equal(root.querySelector('.sg-types td[data-type="causal"]').getAttribute("data-value"), "0.25");
  root.querySelector('[data-view="checks"]').click();
  assert.ok(root.querySelector(".sg-checks tr.sg-warning"));
  assert.match(root.querySelector(".sg-checks").textContent, /few exposed/);
  root.querySelector('[data-view="code"]').click();
  assert.match(root.querySelector("pre.sg-code").textContent, /sg\.analyze/);
  assert.ok(root.querySelector(".sg-copy"));
  assert.equal(root.querySelector(".sg-het").textContent, "Effect modification: Cochran Q 3.20 on 1 df, p = 0.070");
  assert.equal(root.querySelectorAll(".sg-het-all li").length, 1);
});

test("every model.on is paired with a model.off in cleanup", () => {
  const { model, cleanup } = mount();
  assert.ok(model.log.on.length >= 5);
  cleanup();
  assert.equal(model.handlerCount(), 0);
  const key = ([e, cb]) => [e, cb];
  for (const pair of model.log.on) {
    assert.ok(model.log.off.some((o) => o[0] === key(pair)[0] && o[1] === key(pair)[1]), `off for ${pair[0]}`);
  }
});

test("heterogeneity line: headline tests only, I² as a percentage", async () => {
  const { heterogeneityLine } = await import("../explorer.js");
  const tests = [
    { test: "cochran_q", statistic: 15.436, df: 3, p_value: 0.00148, note: "" },
    { test: "i2", statistic: 0.8057, df: null, p_value: null, note: "" },
    { test: "interaction_lr", statistic: 11.4, df: 3, p_value: 0.0099, note: "" },
    { test: "breslow_day", statistic: null, df: null, p_value: null, note: "n/a" },
    { test: "gail_simon", statistic: 0, df: 3, p_value: 0.875, note: "" },
  ];
  assert.equal(
    heterogeneityLine({ modifiers: ["sex"], heterogeneity: tests }),
    "Effect modification: Cochran's Q 15.44 on 3 df, p = 0.001 · I² = 81% · Gail-Simon qualitative 0.00 on 3 df, p = 0.875",
  );
  assert.equal(heterogeneityLine({ modifiers: [], heterogeneity: tests }), "Add a modifier to test for effect modification.");
  assert.equal(heterogeneityLine({ modifiers: ["sex"], heterogeneity: [] }), "No test of effect modification for this analysis.");
});

// -- the effect transported to a target population ---------------------------------------------

function moved(extra = {}) {
  return {
    name: "clinic B",
    state: "ok",
    message: "",
    rows: [
      { population: "study", estimate: 0.25, se: 0.09, ci_low: 0.07, ci_high: 0.43, p_value: 0.006, mean_exposed: 0.5, mean_unexposed: 0.25 },
      { population: "target", estimate: 0.3812345678901234, se: 0.1, ci_low: 0.18523, ci_high: 0.5772, p_value: 0.0001, mean_exposed: 0.61, mean_unexposed: 0.2287654321 },
    ],
    notes: ["Transport assumes the effect within each stratum is the same in the target as in the study."],
    n_target: 500,
    code: "transported = sg.transport(analysis, target)\n",
    ...extra,
  };
}

test("targetRow: none, ok and error", async () => {
  const { targetRow } = await import("../explorer.js");
  assert.equal(targetRow({}), null);
  assert.equal(targetRow(undefined), null);
  const ok = targetRow(moved());
  assert.equal(ok.label, "target: clinic B");
  assert.equal(ok.status, "ok");
  assert.equal(ok.estimate, 0.3812345678901234);
  const bad = targetRow(moved({ state: "error", message: "no such stratum", rows: [] }));
  assert.deepEqual([bad.status, bad.message, bad.label], ["error", "no such stratum", "target: clinic B"]);
});

test("target row: after the overall row, full-precision values, same axis, own marker, notes", () => {
  const rows = [row("a", { estimate: 0.2, ci_low: 0.1, ci_high: 0.3 }), row("overall", { estimate: 0.1, ci_low: 0.05, ci_high: 0.15 })];
  const { root } = mount({ _result: result(rows, { modifiers: ["g"] }), _transport: moved() });
  const trs = [...root.querySelectorAll(".sg-effects table tbody tr")];
  assert.equal(trs.length, 3);
  assert.equal(trs[1].getAttribute("data-stratum"), "overall");
  const tr = trs[2];
  assert.ok(tr.classList.contains("sg-target"));
  assert.equal(tr.getAttribute("data-population"), "target");
  assert.equal(tr.hasAttribute("data-stratum"), false, "the target row is not a stratum");
  assert.equal(tr.querySelector('td[data-field="stratum"]').textContent, "target: clinic B");
  const est = tr.querySelector('td[data-field="estimate"]');
  assert.equal(Number(est.getAttribute("data-value")), 0.3812345678901234);
  assert.equal(est.textContent, "0.381");
  assert.equal(Number(tr.querySelector('td[data-field="mean_unexposed"]').getAttribute("data-value")), 0.2287654321);
  assert.equal(tr.querySelector('td[data-field="status"]').textContent, "transported");
  // the plot spans the extra row, draws it on the same axis (the domain now reaches 0.5772)
  const cell = root.querySelector("td.sg-plot-cell");
  assert.equal(cell.getAttribute("rowspan"), "3");
  const svg = root.querySelector("svg.sg-forest");
  assert.equal(Number(svg.getAttribute("height")), HEAD_H + 3 * ROW_H);
  assert.equal(svg.querySelectorAll("g.sg-row[data-stratum]").length, 2, "strata and overall rows only");
  const w = Number(svg.getAttribute("width"));
  const target = { estimate: 0.3812345678901234, ci_low: 0.18523, ci_high: 0.5772, status: "ok" };
  const ax = axis([...rows, target], false, 0, 10, w - 10);
  assert.ok(Math.abs(ax.domain[1] - (0.5772 + 0.05 * 0.5772)) < 1e-12);
  const g = svg.querySelector('g.sg-target[data-population="target"]');
  const point = g.querySelector("path.sg-point");
  assert.ok(Math.abs(Number(point.getAttribute("data-x")) - ax.x(0.3812345678901234)) < 1e-9);
  assert.match(point.getAttribute("d"), /^M[\d.]+ [\d.]+L/);
  assert.notEqual(point.tagName.toLowerCase(), "circle", "a marker distinct from the strata's");
  const ci = g.querySelector("line.sg-ci");
  assert.ok(Math.abs(Number(ci.getAttribute("x1")) - ax.x(0.18523)) < 1e-9);
  assert.ok(Math.abs(Number(ci.getAttribute("x2")) - ax.x(0.5772)) < 1e-9);
  assert.equal(Number(ci.getAttribute("y1")), HEAD_H + 2 * ROW_H + ROW_H / 2);
  // the overall point moved with the wider axis: it still sits at its own estimate
  const overall = svg.querySelector('g.sg-row[data-stratum="overall"] .sg-point');
  assert.ok(Math.abs(Number(overall.getAttribute("data-x")) - ax.x(0.1)) < 1e-9);
  assert.match(root.querySelector(".sg-transport-notes").textContent, /same in the target/);
  assert.match(root.querySelector("pre.sg-code").textContent, /sg\.transport\(analysis, target\)/);
});

test("target error: the message takes the target row's place, the rest of the view stays", () => {
  const rows = [row("a"), row("overall")];
  const message = "Target stratum/strata 'g=c' (3 rows) do not occur in the study";
  const { root } = mount({ _result: result(rows, { modifiers: ["g"] }), _transport: moved({ state: "error", message, rows: [], notes: [] }) });
  const tr = root.querySelector("tr.sg-target");
  assert.ok(tr.classList.contains("sg-target-error"));
  assert.equal(tr.querySelector("td.sg-transport-message").textContent, message);
  assert.equal(tr.querySelector('td[data-field="status"]').textContent, "not transported");
  assert.equal(tr.querySelector('td[data-field="estimate"]'), null);
  const g = root.querySelector("svg.sg-forest g.sg-target");
  assert.equal(g.querySelector(".sg-point"), null);
  assert.equal(g.querySelector("text.sg-reason").textContent, "not transported");
  // the effects of the study are all still there, and nothing is marked as a whole-widget error
  assert.equal(root.querySelectorAll("svg.sg-forest g.sg-row .sg-point").length, 2);
  assert.equal(root.querySelectorAll('.sg-effects tbody tr[data-stratum]').length, 2);
  assert.ok(!root.classList.contains("sg-stale"));
  assert.equal(root.querySelector(".sg-message").textContent, "");
  assert.equal(root.querySelector(".sg-transport-notes"), null);
});

test("target: Python picking, changing and removing it redraws the Effects view", () => {
  const { model, root } = mount({ _result: result([row("a"), row("overall")], { modifiers: ["g"] }) });
  assert.equal(root.querySelector("tr.sg-target"), null);
  assert.equal(root.querySelector("svg.sg-forest g.sg-target"), null);
  model.put("_transport", moved());
  assert.ok(root.querySelector('tr.sg-target td[data-field="estimate"]'));
  assert.equal(root.querySelector("td.sg-plot-cell").getAttribute("rowspan"), "3");
  model.put("_transport", moved({ name: "clinic C" }));
  assert.equal(root.querySelectorAll("tr.sg-target").length, 1);
  assert.equal(root.querySelector('tr.sg-target td[data-field="stratum"]').textContent, "target: clinic C");
  model.put("_transport", {});
  assert.equal(root.querySelector("tr.sg-target"), null);
  assert.equal(root.querySelector("td.sg-plot-cell").getAttribute("rowspan"), "2");
  assert.doesNotMatch(root.querySelector("pre.sg-code").textContent, /transport/);
});

test("target: a ratio with an interval reaching 0 draws no line, only the point", () => {
  const rows = [row("a", { estimate: 2, ci_low: 1, ci_high: 4 }), row("overall", { estimate: 1.5, ci_low: 1.1, ci_high: 2 })];
  const rr = moved({ rows: [{ population: "study" }, { population: "target", estimate: 1.8, ci_low: 0, ci_high: 3 }] });
  const { root } = mount({ _result: result(rows, { modifiers: ["g"], measure: "rr", ratio: true, null: 1 }), _transport: rr });
  const g = root.querySelector("svg.sg-forest g.sg-target");
  assert.equal(g.querySelector("line.sg-ci"), null);
  assert.ok(g.querySelector("path.sg-point"));
});

test("escaping: a hostile target name, message and note appear as text", () => {
  const { root, model } = mount({
    _result: result([row("a"), row("overall")], { modifiers: ["g"] }),
    _transport: moved({ name: HOSTILE, notes: [`note ${HOSTILE}`] }),
  });
  assert.equal(root.querySelectorAll("img").length, 0);
  assert.equal(root.querySelector('tr.sg-target td[data-field="stratum"]').textContent, `target: ${HOSTILE}`);
  assert.equal(root.querySelector(".sg-transport-notes li").textContent, `note ${HOSTILE}`);
  assert.match(root.querySelector("svg.sg-forest g.sg-target title").textContent, /<img src=x/);
  model.put("_transport", moved({ state: "error", message: HOSTILE, name: "<b>x</b>" }));
  assert.equal(root.querySelectorAll("img").length + root.querySelectorAll("b").length, 0);
  assert.equal(root.querySelector("td.sg-transport-message").textContent, HOSTILE);
});

test("a new result redraws the visible view now and hidden views when they are shown", () => {
  const diag = (warning) => [{ stratum: "overall", check: "n", arm: "exposed", value: 5, warning }];
  const { model, root } = mount({ _result: result([row("overall")], { diagnostics: diag("first") }) });
  root.querySelector('[data-view="checks"]').click();
  assert.match(root.querySelector(".sg-checks").textContent, /first/);
  root.querySelector('[data-view="effects"]').click();
  model.put("_result", result([row("a"), row("overall")], { modifiers: ["g"], diagnostics: diag("second") }));
  assert.equal(root.querySelectorAll(".sg-effects tbody tr").length, 2, "the visible view is current");
  assert.match(root.querySelector(".sg-checks").textContent, /first/, "the hidden view waits");
  root.querySelector('[data-view="checks"]').click();
  assert.match(root.querySelector(".sg-checks").textContent, /second/);
  // while the checks view is shown, a new result redraws it at once
  model.put("_result", result([row("overall")], { diagnostics: diag("third") }));
  assert.match(root.querySelector(".sg-checks").textContent, /third/);
});

test("one message changing _result and _transport draws the Effects view once", () => {
  const { model, root } = mount({ _result: result([row("a"), row("overall")], { modifiers: ["g"] }) });
  let draws = 0;
  const effects = root.querySelector(".sg-effects");
  const real = effects.replaceChildren.bind(effects);
  effects.replaceChildren = (...nodes) => {
    draws += 1;
    return real(...nodes);
  };
  // like Backbone's set of a state message: both values first, then one change event per trait
  model.values._result = result([row("b"), row("overall")], { modifiers: ["g"] });
  model.values._transport = moved();
  model.fire("_result");
  model.fire("_transport");
  assert.equal(draws, 1);
  assert.ok(root.querySelector('tr[data-stratum="b"]') && root.querySelector("tr.sg-target"));
});

// -- the open view and keyboard focus survive a re-created view --------------------------------

test("the open view is a trait: clicks write it, a new view opens it, Python can set it", () => {
  const { model, root, cleanup } = mount();
  root.querySelector('[data-view="checks"]').click();
  assert.equal(model.get("view"), "checks");
  assert.ok(model.log.saves >= 1);
  cleanup();
  // JupyterLab re-creates the view after a snapshot refresh: the new one opens on "checks"
  const el2 = document.createElement("div");
  document.body.append(el2);
  widget.render({ model, el: el2 });
  const root2 = el2.querySelector(".sg-explorer");
  assert.equal(root2.querySelector(".sg-pane:not([hidden])").getAttribute("data-pane"), "checks");
  assert.equal(root2.querySelector('[data-view="checks"]').getAttribute("aria-selected"), "true");
  model.put("view", "code");
  assert.equal(root2.querySelector(".sg-pane:not([hidden])").getAttribute("data-pane"), "code");
  model.put("view", "not-a-view");
  assert.equal(root2.querySelector(".sg-pane:not([hidden])").getAttribute("data-pane"), "code");
});

test("focusPlace and findPlace name chips by column (hostile names too) and controls by name", async () => {
  const { focusPlace, findPlace } = await import("../explorer.js");
  const variables = [{ name: HOSTILE, tag: "2 levels", ok: true, reason: "", kind: "levels" },
    { name: 'a"b', tag: "2 levels", ok: true, reason: "", kind: "levels" }];
  const { root } = mount({ _variables: variables, strata: ['a"b'] });
  const chip = root.querySelector(".sg-variables .sg-chip");
  assert.deepEqual(focusPlace(chip), { area: "variables", column: HOSTILE, part: "chip" });
  assert.equal(findPlace(root, focusPlace(chip)), chip);
  const remove = root.querySelector(".sg-zone .sg-chip .sg-remove");
  assert.deepEqual(focusPlace(remove), { area: "zone", column: 'a"b', part: "sg-remove" });
  assert.equal(findPlace(root, focusPlace(remove)), remove);
  const level = root.querySelector('[data-control="level"]');
  assert.equal(findPlace(root, focusPlace(level)), level);
  // a removed zone chip falls back to the zone's first chip, or the zone
  assert.equal(findPlace(root, { area: "zone", column: "gone", part: "sg-remove" }), root.querySelector(".sg-zone .sg-chip"));
  assert.equal(focusPlace(root), null);
});

test("keyboard focus goes back to the same chip when the view is re-created", async () => {
  const { model, root, cleanup } = mount();
  const sex = root.querySelector('.sg-variables .sg-chip[data-column="sex"]');
  sex.focus();
  assert.equal(document.activeElement, sex);
  sex.dispatchEvent(new KeyboardEvent("keydown", { key: "Enter", bubbles: true }));
  // the output is replaced: old view cleaned up and removed (focus falls to the body) ...
  cleanup();
  el.remove();
  assert.equal(document.activeElement, document.body);
  // ... and a new view of the same model is rendered and attached
  const el2 = document.createElement("div");
  document.body.append(el2);
  widget.render({ model, el: el2 });
  await new Promise((r) => setTimeout(r, 30));
  const again = el2.querySelector('.sg-variables .sg-chip[data-column="sex"]');
  assert.equal(document.activeElement, again);
});

test("focus is left alone when the user moved it elsewhere", async () => {
  const { model, root, cleanup } = mount();
  const outside = document.createElement("input");
  document.body.append(outside);
  root.querySelector('.sg-variables .sg-chip[data-column="sex"]').focus();
  outside.focus(); // focusout with a relatedTarget outside the widget: on purpose
  cleanup();
  el.remove();
  const el2 = document.createElement("div");
  document.body.append(el2);
  const cleanup2 = widget.render({ model, el: el2 });
  await new Promise((r) => setTimeout(r, 30));
  assert.equal(document.activeElement, outside);
  cleanup2();
  outside.remove();
});

test("fmtCheck: whole numbers without decimals, others to 3, both with thousands separators", () => {
  assert.equal(fmtCheck(100000000), "100,000,000");
  assert.equal(fmtCheck(11), "11");
  assert.equal(fmtCheck(1147.4712), "1,147.471");
  assert.equal(fmtCheck(-0.0421), "-0.042");
  assert.equal(fmtCheck(NaN), "—");
  assert.equal(fmtCheck(null), "—");
});

test("Checks open with where the data stayed only for a table in an engine", () => {
  const diagnostics = [{ stratum: "overall", check: "n", arm: "exposed", value: 1617, warning: "" }];
  const engine = { engine: "DuckDB", rows: 100000000, scans: 9 };
  const inEngine = mount({ _result: result([row("overall")], { diagnostics, engine }) }).root;
  inEngine.querySelector('[data-view="checks"]').click();
  assert.match(inEngine.querySelector(".sg-checks").textContent,
    /The data stayed in DuckDB: 100,000,000 rows scanned in 9 full scan\(s\)/);
  document.body.replaceChildren();
  el = document.createElement("div");
  document.body.append(el);
  const inMemory = mount({ _result: result([row("overall")], { diagnostics, engine: {} }) }).root;
  inMemory.querySelector('[data-view="checks"]').click();
  assert.doesNotMatch(inMemory.querySelector(".sg-checks").textContent, /The data stayed in/);
  assert.match(inMemory.querySelector(".sg-checks").textContent, /1,617/);
});
