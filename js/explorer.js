// stratagem Explorer: the front end of stratagem.widgets.Explorer (anywidget ES module).
//
// The view draws what Python publishes (`_result`, `_status`, `_variables`, `_transport`) and writes only the
// public inputs (`strata`, `bins`, `method`, `measure`, `level`, `interval`, `n_boot`) with
// model.set + model.save_changes. Nothing is computed here but layout. Every string that comes from
// the data is inserted with textContent or setAttribute, never as HTML. No network, no imports.

/** @typedef {{ get(name: string): any, set(name: string, value: any): void,
 *   on(event: string, cb: Function): void, off(event: string, cb?: Function): void,
 *   save_changes(): void }} Model */

const SVG = "http://www.w3.org/2000/svg";
const DRAG_TYPE = "application/x-stratagem-column";

export const METHODS = [
  ["crude", "crude"],
  ["mantel-haenszel", "Mantel-Haenszel"],
  ["standardization", "standardization"],
  ["ipw", "IPW"],
  ["aipw", "AIPW"],
  ["exact", "exact"],
];
const BINARY_MEASURES = [
  ["rd", "risk difference"],
  ["rr", "risk ratio"],
  ["or", "odds ratio"],
];
const NUMERIC_MEASURES = [["md", "mean difference"]];
const LEVELS = [0.8, 0.9, 0.95, 0.99];
const VIEWS = [
  ["effects", "Effects"],
  ["types", "Response types"],
  ["checks", "Checks"],
  ["code", "Code"],
];
// The interval plot is a table cell spanning every body row, placed after PLOT_AFTER.
const PLOT_AFTER = "mean_unexposed";
const TABLE_FIELDS = [
  ["stratum", "stratum"],
  ["n", "n"],
  ["n_exposed", "n exp."],
  ["n_unexposed", "n unexp."],
  ["mean_exposed", "mean exp."],
  ["mean_unexposed", "mean unexp."],
  ["estimate", "estimate"],
  ["ci_low", "lower"],
  ["ci_high", "upper"],
  ["p_value", "p"],
  ["status", "status"],
];
const COUNT_FIELDS = new Set(["n", "n_exposed", "n_unexposed"]);
const TYPES = ["doomed", "causal", "preventive", "immune"];
export const ROW_H = 28; // table rows and plot rows share this height (px)
export const HEAD_H = 0; // the plot starts at the first body row (its axis sits in the header)
const AXIS_H = 34; // height of the axis drawn in the table header (px)
const PLOT_W = 200;
const PAD = 10;

// ---------------------------------------------------------------------------------------------
// Small DOM helpers

/**
 * @param {string} tag
 * @param {Record<string, string>} [attrs]
 * @param {string} [text]
 */
function h(tag, attrs = {}, text) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, v);
  if (text !== undefined) node.textContent = text;
  return node;
}

/**
 * @param {string} tag
 * @param {Record<string, string|number>} [attrs]
 * @param {string} [text]
 */
function s(tag, attrs = {}, text) {
  const node = document.createElementNS(SVG, tag);
  for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, String(v));
  if (text !== undefined) node.textContent = text;
  return node;
}

/** A number for reading: fixed decimals, "—" when missing. */
export function fmt(value, digits = 3) {
  if (value === null || value === undefined || !Number.isFinite(value)) return "—";
  if (Number.isInteger(value) && Math.abs(value) >= 1000) return value.toLocaleString("en-US");
  return value.toFixed(digits);
}

function fmtCount(value) {
  if (value === null || value === undefined || !Number.isFinite(value)) return "—";
  return Math.round(value).toLocaleString("en-US");
}

/** A value in the Checks: counts (whole numbers) without decimals, others to 3 decimals; both
 * with thousands separators. */
export function fmtCheck(value) {
  if (value === null || value === undefined || !Number.isFinite(value)) return "—";
  if (Number.isInteger(value)) return value.toLocaleString("en-US");
  return value.toLocaleString("en-US", { minimumFractionDigits: 3, maximumFractionDigits: 3 });
}

function fmtP(p) {
  if (p === null || p === undefined || !Number.isFinite(p)) return "";
  return p < 0.001 ? "p < 0.001" : `p = ${p.toFixed(3)}`;
}

// ---------------------------------------------------------------------------------------------
// Plot geometry (same rules as stratagem/widgets/snapshot.py: axis)

/** Round tick values in [lo, hi]: steps of 1, 2 or 5 times a power of ten. */
export function niceTicks(lo, hi, count = 5) {
  if (!Number.isFinite(lo) || !Number.isFinite(hi) || hi <= lo) return [];
  const raw = (hi - lo) / count;
  const mag = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 5, 10].map((m) => m * mag).find((v) => v >= raw * (1 - 1e-12));
  const first = Math.ceil(lo / step - 1e-9);
  const last = Math.floor(hi / step + 1e-9);
  const out = [];
  for (let k = first; k <= last; k++) out.push(Number((k * step).toFixed(12)));
  return out;
}

/**
 * Domain, pixel mapping and ticks of the interval plot: log axis for ratios, padded by 5% of the
 * span, the null value always inside. Only rows with status "ok" set the domain.
 * @param {Array<any>} rows
 * @param {boolean} ratio
 * @param {number} nullValue
 * @param {number} left
 * @param {number} right
 */
export function axis(rows, ratio, nullValue, left, right) {
  const t = (v) => (ratio ? Math.log(v) : v);
  const values = [nullValue];
  for (const row of rows) {
    if (row.status !== "ok") continue;
    for (const key of ["estimate", "ci_low", "ci_high"]) {
      const v = row[key];
      if (v !== null && v !== undefined && Number.isFinite(v) && (v > 0 || !ratio)) values.push(v);
    }
  }
  const tv = values.map(t);
  let lo = Math.min(...tv);
  let hi = Math.max(...tv);
  if (hi - lo < 1e-12) {
    lo -= ratio ? 0.5 : 1;
    hi += ratio ? 0.5 : 1;
  }
  const pad = 0.05 * (hi - lo);
  const d0 = lo - pad;
  const d1 = hi + pad;
  const x = (v) => left + ((t(v) - d0) / (d1 - d0)) * (right - left);
  let ticks = [];
  if (ratio) {
    const ln10 = Math.log(10);
    for (let k = Math.floor(d0 / ln10) - 1; k <= Math.ceil(d1 / ln10); k++) {
      for (const m of [1, 2, 5]) {
        const v = m * 10 ** k;
        if (Math.log(v) >= d0 && Math.log(v) <= d1) ticks.push(Number(v.toFixed(12)));
      }
    }
    if (ticks.length < 3) ticks = niceTicks(Math.exp(d0), Math.exp(d1)).filter((v) => v > 0);
  } else {
    ticks = niceTicks(d0, d1);
  }
  return { domain: [d0, d1], x, ticks };
}

// ---------------------------------------------------------------------------------------------
// Heterogeneity line (same rules as stratagem/widgets/snapshot.py: heterogeneity_line)

export const TEST_NAMES = {
  cochran_q: "Cochran's Q",
  i2: "I²",
  interaction_wald: "interaction Wald",
  interaction_lr: "interaction LR",
  breslow_day: "Breslow-Day",
  gail_simon: "Gail-Simon qualitative",
};
const HEADLINE = ["cochran_q", "i2", "gail_simon"];
const finite = (v) => v !== null && v !== undefined && Number.isFinite(v);

function testPiece(t) {
  const name = TEST_NAMES[t.test] ?? String(t.test).replaceAll("_", " ");
  if (t.test === "i2") return finite(t.statistic) ? `I² = ${(t.statistic * 100).toFixed(0)}%` : "";
  if (!finite(t.statistic) && !finite(t.p_value)) return "";
  let piece = `${name} ${fmt(t.statistic, 2)}`;
  if (finite(t.df)) piece += ` on ${t.df.toFixed(0)} df`;
  if (finite(t.p_value)) piece += `, ${fmtP(t.p_value)}`;
  return piece;
}

/** One line of the tests of effect modification, or why there is none. */
export function heterogeneityLine(result) {
  const tests = result.heterogeneity || [];
  if (!(result.modifiers || []).length) return "Add a modifier to test for effect modification.";
  const head = tests.filter((t) => HEADLINE.includes(t.test));
  const pieces = (head.length ? head : tests).map(testPiece).filter((p) => p);
  if (!pieces.length) return "No test of effect modification for this analysis.";
  return `Effect modification: ${pieces.join(" · ")}`;
}

// ---------------------------------------------------------------------------------------------
// The effect transported to a target population (same rules as snapshot.py: target_row)

/**
 * The row of the transported effect shown after the overall row, or null when no target is picked.
 * `transport` is the `_transport` trait: {name, state: "ok"|"error", message, rows: [study, target],
 * notes, code}. The row carries `label` ("target: <name>"), `status` ("ok" or "error"), `message`
 * and, when ok, the target row's numbers.
 * @param {any} transport
 */
export function targetRow(transport) {
  if (!transport || !transport.state) return null;
  const label = `target: ${transport.name ?? "target"}`;
  if (transport.state !== "ok") {
    return { population: "target", label, status: "error", message: transport.message || "The effect could not be transported." };
  }
  const found = (transport.rows || []).find((r) => r.population === "target");
  if (!found) return null;
  return { ...found, label, status: "ok", message: "" };
}

// ---------------------------------------------------------------------------------------------
// Stratify-by list edits (pure, tested)

/**
 * The new strata after dropping `column` on the zone: before `target` when dropped on a chip
 * (taking its place when moved from inside the zone), else at the end. A column already in the zone
 * is moved, never duplicated.
 * @param {string[]} strata
 * @param {string} column
 * @param {string|null} target
 */
export function placeColumn(strata, column, target) {
  const rest = strata.filter((c) => c !== column);
  if (target === null || target === column || !strata.includes(target)) {
    return target === column ? strata.slice() : [...rest, column];
  }
  const at = strata.indexOf(target);
  rest.splice(Math.min(at, rest.length), 0, column);
  return rest;
}

/** Move `column` one place left (-1) or right (+1) in the nesting order. */
export function shiftColumn(strata, column, by) {
  const i = strata.indexOf(column);
  const j = i + by;
  if (i < 0 || j < 0 || j >= strata.length) return strata.slice();
  const out = strata.slice();
  [out[i], out[j]] = [out[j], out[i]];
  return out;
}

// ---------------------------------------------------------------------------------------------
// Keyboard focus across a re-created view
//
// Each new result refreshes the output's static snapshot, and JupyterLab then re-creates the view
// from the model. The open view is a trait (`view`); the focused control is remembered here, per
// model, and given back to the same control of the new view when focus was lost with the old one.
// The key is the model's `_variables` list: the same object for as long as the model lives (the
// model handed to render is a fresh wrapper per view, so it cannot be the key).

const FOCUS_MS = 60000; // a remembered focus older than this is not restored
const focusMemory = new WeakMap();

/** Where `node` sits in the view, as plain data (chips by their column, controls by name). */
export function focusPlace(node) {
  if (!(node instanceof Element)) return null;
  const chipNode = node.closest(".sg-chip[data-column]");
  if (chipNode) {
    const part = ["sg-add", "sg-remove", "sg-bins"].find((c) => node.classList.contains(c)) || "chip";
    return { area: chipNode.closest(".sg-zone") ? "zone" : "variables", column: chipNode.getAttribute("data-column"), part };
  }
  for (const attr of ["data-control", "data-view"]) {
    if (node.hasAttribute(attr)) return { attr, value: node.getAttribute(attr) };
  }
  if (node.classList.contains("sg-copy")) return { attr: "class", value: "sg-copy" };
  return null;
}

/** The element of `root` at `place` (see focusPlace), or a near one, or null. */
export function findPlace(root, place) {
  if (!place) return null;
  if (place.column !== undefined) {
    const area = root.querySelector(place.area === "zone" ? ".sg-zone" : ".sg-variables");
    const chips = area ? [...area.querySelectorAll(".sg-chip[data-column]")] : [];
    const found = chips.find((c) => c.getAttribute("data-column") === place.column);
    if (!found) return place.area === "zone" ? root.querySelector(".sg-zone .sg-chip") || root.querySelector(".sg-zone") : null;
    return place.part === "chip" ? found : found.querySelector(`.${place.part}`) || found;
  }
  if (place.attr === "class") return root.querySelector(`.${place.value}`);
  return [...root.querySelectorAll(`[${place.attr}]`)].find((n) => n.getAttribute(place.attr) === place.value) || null;
}

// ---------------------------------------------------------------------------------------------
// The view

/** @param {{ model: Model, el: HTMLElement }} ctx */
function render({ model, el }) {
  /** @type {Array<[string, Function]>} */
  const listeners = [];
  const listen = (event, cb) => {
    model.on(event, cb);
    listeners.push([event, cb]);
  };
  let view = VIEWS.some(([k]) => k === model.get("view")) ? model.get("view") : "effects";
  let dragging = null; // column being dragged from this view (fallback when dataTransfer is empty)

  const root = h("div", { class: "sg-explorer" });
  el.replaceChildren(root);

  // -- layout --------------------------------------------------------------------------------
  const title = h("div", { class: "sg-title" });
  const side = h("section", { class: "sg-variables", "aria-label": "Variables" });
  side.append(h("h3", {}, "Variables"));
  const varHint = h("p", { class: "sg-hint" }, "Drag into Stratify by, or press Enter.");
  const varList = h("ul", { class: "sg-list" });
  side.append(varHint, varList);

  const main = h("div", { class: "sg-main" });
  const zoneWrap = h("div", { class: "sg-zone-wrap" });
  const zoneLabel = h("span", { class: "sg-zone-label" }, "Stratify by");
  const zone = h("div", { class: "sg-zone", role: "list", "aria-label": "Stratify by" });
  zoneWrap.append(zoneLabel, zone);

  const controls = h("div", { class: "sg-controls" });
  const control = (name, label, node) => {
    const wrap = h("label", { class: "sg-control" });
    wrap.append(h("span", {}, label), node);
    controls.append(wrap);
    return node;
  };
  const methodSel = control("method", "Method", h("select", { "data-control": "method" }));
  const measureSel = control("measure", "Measure", h("select", { "data-control": "measure" }));
  const levelSel = control("level", "Level", h("select", { "data-control": "level" }));
  const intervalSel = control("interval", "Interval", h("select", { "data-control": "interval" }));
  for (const [v, t] of [["wald", "Wald"], ["bootstrap", "bootstrap"]]) intervalSel.append(h("option", { value: v }, t));
  const nBoot = control(
    "n_boot",
    "Replicates",
    h("input", { "data-control": "n_boot", type: "number", min: "10", max: "100000", step: "100" }),
  );

  const status = h("div", { class: "sg-status", role: "status", "aria-live": "polite" });
  const message = h("div", { class: "sg-message" });
  const progress = h("progress", { class: "sg-progress", max: "1", value: "0" });
  progress.hidden = true;
  status.append(message, progress);

  const tabs = h("div", { class: "sg-tabs", role: "tablist" });
  const panes = {};
  for (const [key, label] of VIEWS) {
    const b = h("button", { type: "button", role: "tab", "data-view": key }, label);
    b.addEventListener("click", () => {
      showView(key);
      if (model.get("view") !== key) write("view", key); // kept in a trait: survives a new view
    });
    tabs.append(b);
  }
  const effects = h("section", { class: "sg-effects sg-pane", "data-pane": "effects" });
  const types = h("section", { class: "sg-types sg-pane", "data-pane": "types" });
  const checks = h("section", { class: "sg-checks sg-pane", "data-pane": "checks" });
  const code = h("section", { class: "sg-code-pane sg-pane", "data-pane": "code" });
  Object.assign(panes, { effects, types, checks, code });

  const notes = h("ul", { class: "sg-notes" });
  const caution = h("p", { class: "sg-caution" });
  main.append(zoneWrap, controls, status, tabs, effects, types, checks, code, notes, caution);
  const body = h("div", { class: "sg-body" });
  body.append(side, main);
  root.append(title, body);

  // -- writing inputs --------------------------------------------------------------------------
  const write = (name, value) => {
    model.set(name, value);
    model.save_changes();
  };
  const setStrata = (next) => {
    const cur = model.get("strata") || [];
    if (next.length === cur.length && next.every((c, i) => c === cur[i])) return;
    const bins = { ...(model.get("bins") || {}) };
    let binsChanged = false;
    for (const k of Object.keys(bins)) {
      if (!next.includes(k)) {
        delete bins[k];
        binsChanged = true;
      }
    }
    model.set("strata", next);
    if (binsChanged) model.set("bins", bins);
    model.save_changes();
  };
  const variable = (name) => (model.get("_variables") || []).find((v) => v.name === name);
  const addColumn = (name) => {
    const v = variable(name);
    if (!v || !v.ok) return;
    const cur = model.get("strata") || [];
    if (!cur.includes(name)) setStrata([...cur, name]);
  };
  const removeColumn = (name) => setStrata((model.get("strata") || []).filter((c) => c !== name));

  // -- variables -------------------------------------------------------------------------------
  function drawVariables() {
    const used = new Set(model.get("strata") || []);
    varList.replaceChildren();
    for (const v of model.get("_variables") || []) {
      const li = h("li");
      const chip = h("div", { class: "sg-chip", "data-column": v.name, tabindex: "0", role: "button" });
      chip.append(h("span", { class: "sg-name" }, v.name), h("span", { class: "sg-tag" }, v.tag));
      const add = h("button", { type: "button", class: "sg-add", "aria-label": `Stratify by ${v.name}` }, "+");
      chip.append(add);
      if (!v.ok) {
        chip.setAttribute("aria-disabled", "true");
        chip.setAttribute("title", `${v.name} cannot serve as a modifier: ${v.reason}`);
        chip.setAttribute("draggable", "false");
        add.disabled = true;
      } else {
        chip.setAttribute("draggable", "true");
        chip.setAttribute("title", `${v.name}: ${v.tag}`);
        if (used.has(v.name)) {
          chip.classList.add("sg-used");
          add.disabled = true;
        }
        chip.addEventListener("dragstart", (e) => startDrag(e, v.name));
        chip.addEventListener("dragend", endDrag);
        chip.addEventListener("keydown", (e) => {
          if (e.key === "Enter" || e.key === " ") {
            e.preventDefault();
            addColumn(v.name);
          }
        });
        add.addEventListener("click", (e) => {
          e.stopPropagation();
          addColumn(v.name);
        });
      }
      li.append(chip);
      varList.append(li);
    }
  }

  // -- the zone --------------------------------------------------------------------------------
  function drawZone() {
    const strata = model.get("strata") || [];
    const bins = model.get("bins") || {};
    zone.replaceChildren();
    if (strata.length === 0) {
      zone.append(h("span", { class: "sg-placeholder" }, "Drop variables here to stratify; the order is the nesting order."));
    }
    strata.forEach((name, i) => {
      const v = variable(name) || { name, tag: "", kind: "levels" };
      const chip = h("div", {
        class: "sg-chip",
        "data-column": name,
        tabindex: "0",
        role: "listitem",
        draggable: "true",
        "aria-label": `${name}, modifier ${i + 1} of ${strata.length}; Delete removes it, Alt+arrows move it`,
      });
      chip.append(h("span", { class: "sg-name" }, name));
      if (v.kind === "numeric") {
        const input = h("input", {
          class: "sg-bins",
          type: "number",
          min: "2",
          max: "20",
          step: "1",
          "aria-label": `bins for ${name}`,
          title: "number of quantile bins",
        });
        input.value = String(bins[name] ?? 4);
        input.addEventListener("change", () => {
          const n = Math.round(Number(input.value));
          if (!Number.isFinite(n) || n < 2) return;
          write("bins", { ...(model.get("bins") || {}), [name]: n });
        });
        input.addEventListener("keydown", (e) => e.stopPropagation());
        chip.append(input, h("span", { class: "sg-tag" }, "bins"));
      } else if (v.tag) {
        chip.append(h("span", { class: "sg-tag" }, v.tag));
      }
      const remove = h("button", { type: "button", class: "sg-remove", "aria-label": `Remove ${name}` }, "×");
      remove.addEventListener("click", () => removeColumn(name));
      chip.append(remove);
      chip.addEventListener("dragstart", (e) => startDrag(e, name));
      chip.addEventListener("dragend", endDrag);
      chip.addEventListener("keydown", (e) => {
        if (e.target !== chip) return;
        if (e.key === "Delete" || e.key === "Backspace") {
          e.preventDefault();
          removeColumn(name);
        } else if (e.altKey && (e.key === "ArrowLeft" || e.key === "ArrowRight")) {
          e.preventDefault();
          setStrata(shiftColumn(model.get("strata") || [], name, e.key === "ArrowLeft" ? -1 : 1));
        }
      });
      zone.append(chip);
    });
  }

  function startDrag(e, name) {
    dragging = name;
    if (e.dataTransfer) {
      e.dataTransfer.setData(DRAG_TYPE, name);
      e.dataTransfer.setData("text/plain", name);
      e.dataTransfer.effectAllowed = "move";
    }
  }
  function endDrag() {
    dragging = null;
    zone.classList.remove("sg-over");
  }
  const onDragOver = (e) => {
    e.preventDefault();
    if (e.dataTransfer) e.dataTransfer.dropEffect = "move";
    zone.classList.add("sg-over");
  };
  const onDragLeave = (e) => {
    if (!zone.contains(e.relatedTarget)) zone.classList.remove("sg-over");
  };
  const onDrop = (e) => {
    e.preventDefault();
    zone.classList.remove("sg-over");
    const dt = e.dataTransfer;
    const name = (dt && (dt.getData(DRAG_TYPE) || dt.getData("text/plain"))) || dragging;
    dragging = null;
    if (!name) return;
    const v = variable(name);
    if (!v || !v.ok) return;
    const onChip = e.target instanceof Element ? e.target.closest(".sg-zone .sg-chip") : null;
    const target = onChip ? onChip.getAttribute("data-column") : null;
    setStrata(placeColumn(model.get("strata") || [], name, target));
  };
  zone.addEventListener("dragover", onDragOver);
  zone.addEventListener("dragenter", onDragOver);
  zone.addEventListener("dragleave", onDragLeave);
  zone.addEventListener("drop", onDrop);

  // -- controls --------------------------------------------------------------------------------
  function fillSelect(sel, options, value) {
    sel.replaceChildren();
    for (const [v, t] of options) sel.append(h("option", { value: String(v) }, t));
    sel.value = String(value);
  }
  function drawControls() {
    const result = model.get("_result") || {};
    const spec = result.spec || {};
    const method = model.get("method") || spec.method || "crude";
    fillSelect(methodSel, METHODS, method);
    const binary = (model.get("measure") || spec.measure || "rd") !== "md";
    fillSelect(measureSel, binary ? BINARY_MEASURES : NUMERIC_MEASURES, model.get("measure") || spec.measure || (binary ? "rd" : "md"));
    const level = model.get("level");
    const levels = LEVELS.includes(level) ? LEVELS : [...LEVELS, level].sort((a, b) => a - b);
    fillSelect(levelSel, levels.map((l) => [l, `${Math.round(l * 1000) / 10}%`]), level);
    intervalSel.value = model.get("interval");
    nBoot.value = String(model.get("n_boot"));
    nBoot.disabled = model.get("interval") !== "bootstrap";
  }
  methodSel.addEventListener("change", () => write("method", methodSel.value));
  measureSel.addEventListener("change", () => write("measure", measureSel.value));
  levelSel.addEventListener("change", () => write("level", Number(levelSel.value)));
  intervalSel.addEventListener("change", () => write("interval", intervalSel.value));
  nBoot.addEventListener("change", () => {
    const n = Math.round(Number(nBoot.value));
    if (Number.isFinite(n)) write("n_boot", n);
  });

  // -- views -----------------------------------------------------------------------------------
  function showView(key) {
    view = key;
    if (stale.has(key)) drawPane(key);
    for (const b of tabs.querySelectorAll("button[data-view]")) {
      const on = b.getAttribute("data-view") === key;
      b.setAttribute("aria-selected", on ? "true" : "false");
      b.classList.toggle("sg-active", on);
    }
    for (const [k, pane] of Object.entries(panes)) pane.hidden = k !== key;
  }

  let drawn = [undefined, undefined]; // the (_result, _transport) values the Effects view shows
  function drawEffects() {
    const result = model.get("_result") || {};
    const transport = model.get("_transport") || {};
    // One message from Python may change both traits: draw once, not once per change event.
    if (drawn[0] === model.get("_result") && drawn[1] === model.get("_transport") && drawn[0] !== undefined) return;
    drawn = [model.get("_result"), model.get("_transport")];
    effects.replaceChildren();
    const rows = result.rows || [];
    if (rows.length === 0) {
      effects.append(h("p", { class: "sg-empty" }, "No result yet."));
      return;
    }
    const target = targetRow(transport);
    const wrap = h("div", { class: "sg-effects-grid" });
    const table = h("table");
    const thead = h("thead");
    const hr = h("tr");
    const plot = drawPlot(result, target);
    const modifiers = result.modifiers || [];
    table.classList.toggle("sg-all-ok", rows.every((r) => r.status === "ok"));
    for (const [field, fieldLabel] of TABLE_FIELDS) {
      // The stratum column is headed by the modifiers and shows each row's levels (compact).
      const label = field === "stratum" && modifiers.length ? modifiers.join(" · ") : fieldLabel;
      hr.append(h("th", { scope: "col", class: COUNT_FIELDS.has(field) || field.startsWith("mean") || field.startsWith("ci") || field === "estimate" || field === "p_value" ? "sg-num" : "" }, label));
      if (field === PLOT_AFTER) {
        const th = h("th", { class: "sg-plot-head", scope: "col" });
        th.append(plot.axisSvg);
        hr.append(th);
      }
    }
    thead.append(hr);
    const tbody = h("tbody");
    rows.forEach((row, i) => {
      const tr = h("tr", { "data-stratum": String(row.stratum) });
      if (row.stratum === "overall") tr.classList.add("sg-overall");
      if (row.status !== "ok") tr.classList.add("sg-not-estimable");
      for (const [field] of TABLE_FIELDS) {
        const v = row[field];
        const td = h("td", { "data-field": field });
        if (field === "stratum") {
          const levels = modifiers.map((m) => String((row.levels || {})[m] ?? ""));
          td.textContent = row.stratum === "overall" || !modifiers.length ? String(v ?? "") : levels.join(" · ");
          td.setAttribute("title", String(v ?? ""));
        } else if (field === "status") {
          td.textContent = String(v ?? "");
        } else {
          td.textContent = COUNT_FIELDS.has(field) ? fmtCount(v) : field === "p_value" ? fmtP(v).replace("p = ", "").replace("p < ", "<") : fmt(v);
          td.setAttribute("data-value", v === null || v === undefined ? "" : String(v));
          td.classList.add("sg-num");
        }
        tr.append(td);
        if (field === PLOT_AFTER && i === 0) {
          const cell = h("td", { class: "sg-plot-cell", rowspan: String(rows.length + (target ? 1 : 0)) });
          cell.append(plot.svg);
          tr.append(cell);
        }
      }
      tbody.append(tr);
    });
    if (target) tbody.append(targetTr(target));
    table.append(thead, tbody);
    wrap.append(table);
    effects.append(wrap);
    if (target) {
      const items = target.status === "ok" ? transport.notes || [] : [];
      const list = h("ul", { class: "sg-transport-notes" });
      for (const n of items) list.append(h("li", {}, String(n)));
      if (items.length) effects.append(list);
    }
    effects.append(h("p", { class: "sg-het" }, heterogeneityLine(result)));
    const tests = result.heterogeneity || [];
    if (tests.length) {
      const details = h("details", { class: "sg-het-all" });
      details.append(h("summary", {}, "All tests of effect modification"));
      const list = h("ul");
      for (const t of tests) {
        const piece = testPiece(t);
        const li = h("li", { "data-test": String(t.test) }, piece || TEST_NAMES[t.test] || String(t.test));
        if (t.note) li.append(h("span", { class: "sg-hint" }, ` — ${t.note}`));
        list.append(li);
      }
      details.append(list);
      effects.append(details);
    }
    effects.append(h("p", { class: "sg-scale" }, `${result.scale_note}; ${Math.round(result.level * 1000) / 10}% ${result.interval === "wald" ? "Wald" : result.interval} intervals.`));
  }

  /** The table row of the transported effect: its numbers, or the reason it has none. */
  function targetTr(target) {
    const tr = h("tr", { class: "sg-target", "data-population": "target" });
    if (target.status !== "ok") tr.classList.add("sg-target-error");
    let skip = 0;
    for (const [field] of TABLE_FIELDS) {
      if (skip > 0) {
        skip -= 1;
        continue;
      }
      if (field === "stratum") {
        tr.append(h("td", { "data-field": "stratum", title: target.label }, target.label));
      } else if (field === "status") {
        tr.append(h("td", { "data-field": "status" }, target.status === "ok" ? "transported" : "not transported"));
      } else if (target.status !== "ok" && field === "estimate") {
        // The reason takes the place of the numbers (estimate to p); the rest of the view stays.
        const span = ["estimate", "ci_low", "ci_high", "p_value"].length;
        tr.append(h("td", { class: "sg-transport-message", colspan: String(span), role: "note" }, target.message));
        skip = span - 1;
      } else if (COUNT_FIELDS.has(field) || target.status !== "ok") {
        tr.append(h("td", { "data-field": field, class: "sg-num" }, ""));
      } else {
        const v = target[field];
        const td = h("td", { "data-field": field, class: "sg-num" },
          field === "p_value" ? fmtP(v).replace("p = ", "").replace("p < ", "<") : fmt(v));
        td.setAttribute("data-value", v === null || v === undefined ? "" : String(v));
        tr.append(td);
      }
    }
    return tr;
  }

  function drawPlot(result, target = null) {
    const rows = result.rows || [];
    const shown = rows.length + (target ? 1 : 0);
    const height = HEAD_H + ROW_H * shown;
    const svg = s("svg", { class: "sg-forest", width: PLOT_W, height, viewBox: `0 0 ${PLOT_W} ${height}`, role: "img" });
    svg.setAttribute("aria-label", `${result.measure_name} by stratum with intervals`);
    const axisSvg = s("svg", { class: "sg-axis", width: PLOT_W, height: AXIS_H, viewBox: `0 0 ${PLOT_W} ${AXIS_H}`, "aria-hidden": "true" });
    const left = PAD;
    const right = PLOT_W - PAD;
    const ax = axis(target ? [...rows, target] : rows, !!result.ratio, result.null, left, right);
    const bottom = HEAD_H + ROW_H * shown;
    axisSvg.append(s("text", { class: "sg-axis-title", x: PLOT_W / 2, y: 12, "text-anchor": "middle" },
      `${result.measure_name}${result.ratio ? " (log scale)" : ""}`));
    for (const tick of ax.ticks) {
      const xt = ax.x(tick);
      axisSvg.append(s("text", { class: "sg-tick-label", x: xt, y: AXIS_H - 8, "text-anchor": "middle" }, String(tick)));
      axisSvg.append(s("line", { class: "sg-tick", x1: xt, x2: xt, y1: AXIS_H - 4, y2: AXIS_H }));
      svg.append(s("line", { class: "sg-tick", x1: xt, x2: xt, y1: 0, y2: bottom }));
    }
    const xn = ax.x(result.null);
    svg.append(s("line", { class: "sg-null", x1: xn, x2: xn, y1: 0, y2: bottom }));
    // The axis title is also kept in the plot itself for assistive technology and tests.
    svg.append(s("title", {}, `${result.measure_name}${result.ratio ? " (log scale)" : ""}`));
    svg.querySelector("title").setAttribute("class", "sg-axis-title");
    rows.forEach((row, i) => {
      const cy = HEAD_H + ROW_H * i + ROW_H / 2;
      const g = s("g", { class: "sg-row", "data-stratum": String(row.stratum) });
      const overall = row.stratum === "overall";
      if (overall) g.classList.add("sg-overall");
      const est = row.estimate;
      const ok = row.status === "ok" && Number.isFinite(est) && (est > 0 || !result.ratio);
      if (ok) {
        const lo = row.ci_low;
        const hi = row.ci_high;
        if (Number.isFinite(lo) && Number.isFinite(hi) && (lo > 0 || !result.ratio)) {
          g.append(s("line", { class: "sg-ci", x1: ax.x(lo), x2: ax.x(hi), y1: cy, y2: cy }));
        }
        const x = ax.x(est);
        const point = overall
          ? s("path", { class: "sg-point", d: `M${x} ${cy - 6}L${x + 6} ${cy}L${x} ${cy + 6}L${x - 6} ${cy}Z`, "data-x": x })
          : s("circle", { class: "sg-point", cx: x, cy, r: 4, "data-x": x });
        point.append(s("title", {}, `${row.stratum}: ${fmt(est)} (${fmt(lo)} to ${fmt(hi)})`));
        g.append(point);
      } else {
        g.append(s("text", { class: "sg-reason", x: left, y: cy + 4 }, String(row.status)));
      }
      svg.append(g);
    });
    if (target) svg.append(drawTarget(target, ax, !!result.ratio, HEAD_H + ROW_H * rows.length + ROW_H / 2, left));
    return { svg, axisSvg };
  }

  /** The transported effect on the same axis: an interval and a triangle in its own colour. */
  function drawTarget(target, ax, ratio, cy, left) {
    const g = s("g", { class: "sg-target", "data-population": "target" });
    const est = target.estimate;
    if (target.status === "ok" && Number.isFinite(est) && (est > 0 || !ratio)) {
      const lo = target.ci_low;
      const hi = target.ci_high;
      if (Number.isFinite(lo) && Number.isFinite(hi) && (lo > 0 || !ratio)) {
        g.append(s("line", { class: "sg-ci", x1: ax.x(lo), x2: ax.x(hi), y1: cy, y2: cy }));
      }
      const x = ax.x(est);
      const point = s("path", { class: "sg-point", d: `M${x} ${cy - 6}L${x + 6} ${cy + 5}L${x - 6} ${cy + 5}Z`, "data-x": x });
      point.append(s("title", {}, `${target.label}: ${fmt(est)} (${fmt(lo)} to ${fmt(hi)})`));
      g.append(point);
    } else {
      g.append(s("text", { class: "sg-reason", x: left, y: cy + 4 }, "not transported"));
    }
    return g;
  }

  function drawTypes(result) {
    types.replaceChildren();
    const rows = result.response_types || [];
    if (rows.length === 0) {
      types.append(h("p", { class: "sg-empty" },
        "No response types for this analysis: they are exact with known potential outcomes (method 'exact') and bounded when the analysis provides bounds."));
      return;
    }
    const exact = rows.every((r) => r.lower === r.upper);
    types.append(h("p", { class: "sg-hint" }, exact
      ? "Shares of the four response types (exact: both potential outcomes are known)."
      : "Bounds on the shares of the four response types (lower to upper)."));
    const byStratum = new Map();
    for (const r of rows) {
      if (!byStratum.has(r.stratum)) byStratum.set(r.stratum, {});
      byStratum.get(r.stratum)[r.type] = r;
    }
    const table = h("table");
    const hr = h("tr");
    hr.append(h("th", { scope: "col" }, "stratum"));
    for (const t of TYPES) hr.append(h("th", { scope: "col" }, t));
    const thead = h("thead");
    thead.append(hr);
    const tbody = h("tbody");
    for (const [stratum, cells] of byStratum) {
      const tr = h("tr", { "data-stratum": String(stratum) });
      tr.append(h("td", {}, String(stratum)));
      for (const t of TYPES) {
        const r = cells[t];
        const td = h("td", { "data-type": t });
        if (!r) td.textContent = "—";
        else if (r.lower === r.upper) {
          td.textContent = fmt(r.lower);
          td.setAttribute("data-value", String(r.lower));
          const bar = h("span", { class: "sg-share" });
          bar.style.width = `${Math.max(0, Math.min(1, r.lower || 0)) * 100}%`;
          td.append(bar);
        } else {
          td.textContent = `${fmt(r.lower)} to ${fmt(r.upper)}`;
          td.setAttribute("data-lower", String(r.lower));
          td.setAttribute("data-upper", String(r.upper));
        }
        tr.append(td);
      }
      tbody.append(tr);
    }
    table.append(thead, tbody);
    types.append(table);
  }

  function drawChecks(result) {
    checks.replaceChildren();
    const rows = result.diagnostics || [];
    if (rows.length === 0) {
      checks.append(h("p", { class: "sg-empty" }, "No checks for this analysis (positivity, weights and balance appear here when computed)."));
      return;
    }
    const warned = rows.filter((r) => r.warning);
    const engine = result.engine || {};
    if (engine.engine) {
      // Where the data lives is a fact of the run, not a check: said first, in words.
      checks.append(h("p", { class: "sg-source" },
        `The data stayed in ${engine.engine}: ${fmtCount(engine.rows)} rows scanned in ` +
        `${fmtCount(engine.scans)} full scan(s); only aggregates came back to Python.`));
    }
    checks.append(h("p", { class: warned.length ? "sg-warn-count" : "sg-hint" },
      warned.length ? `${warned.length} warning(s): read them before trusting the estimates.` : "No warnings."));
    if (rows.some((r) => String(r.check ?? "").startsWith("smd "))) {
      checks.append(h("p", { class: "sg-hint" },
        "Balance: smd is the standardized mean difference of a confounder between the exposed and " +
        "unexposed (Austin 2009), before and after inverse probability weighting; " +
        "|smd| above 0.1 after weighting is flagged."));
    }
    const cols = Object.keys(rows[0]);
    const table = h("table");
    const hr = h("tr");
    for (const c of cols) hr.append(h("th", { scope: "col", class: c === "value" ? "sg-num" : "" }, c));
    const thead = h("thead");
    thead.append(hr);
    const tbody = h("tbody");
    for (const r of rows) {
      const tr = h("tr", { "data-stratum": String(r.stratum ?? "") });
      if (r.warning) tr.classList.add("sg-warning");
      for (const c of cols) {
        const v = r[c];
        tr.append(h("td", { "data-field": c, class: typeof v === "number" ? "sg-num" : "" },
          typeof v === "number" ? fmtCheck(v) : String(v ?? "")));
      }
      tbody.append(tr);
    }
    table.append(thead, tbody);
    checks.append(table);
  }

  const pre = h("pre", { class: "sg-code" });
  const copy = h("button", { type: "button", class: "sg-copy" }, "Copy");
  const copied = h("span", { class: "sg-copied", role: "status" });
  copy.addEventListener("click", async () => {
    const text = pre.textContent || "";
    try {
      await navigator.clipboard.writeText(text);
      copied.textContent = "Copied.";
    } catch {
      // Clipboard refused (e.g. not a secure context): select the text for the user instead.
      const range = document.createRange();
      range.selectNodeContents(pre);
      const sel = window.getSelection();
      sel?.removeAllRanges();
      sel?.addRange(range);
      copied.textContent = "Selected: press Ctrl+C to copy.";
    }
  });
  const codeBar = h("div", { class: "sg-code-bar" });
  codeBar.append(copy, copied);
  code.append(h("p", { class: "sg-hint" }, "Run this with the same table to get the same numbers."), codeBar, pre);

  // Hidden views are drawn when shown: a new result redraws the visible view at once, so the plot
  // updates without waiting for tables nobody is looking at (the checks table has rows per check).
  const stale = new Set();
  function drawPane(key) {
    stale.delete(key);
    const result = model.get("_result") || {};
    if (key === "types") drawTypes(result);
    else if (key === "checks") drawChecks(result);
  }

  function drawResult() {
    const result = model.get("_result") || {};
    title.textContent = result.title ? `${result.title} — ${result.measure_name}, ${result.method}` : "stratagem Explorer";
    drawEffects();
    for (const key of ["types", "checks"]) {
      if (key === view) drawPane(key);
      else stale.add(key);
    }
    drawCode();
    copied.textContent = "";
    notes.replaceChildren();
    for (const n of result.notes || []) notes.append(h("li", {}, n));
    caution.textContent = result.caution || "";
    drawControls();
  }

  function drawCode() {
    const result = model.get("_result") || {};
    const transport = model.get("_transport") || {};
    pre.textContent = (result.recipe || "") + (transport.state && transport.code ? `\n${transport.code}` : "");
  }
  const onTransport = () => {
    drawEffects();
    drawCode();
  };

  function drawStatus() {
    const st = model.get("_status") || { state: "idle" };
    const error = st.state === "error";
    root.classList.toggle("sg-stale", error);
    root.classList.toggle("sg-running", st.state === "running");
    message.textContent = error ? st.message || "Error." : "";
    message.hidden = !error;
    progress.hidden = st.state !== "running";
    progress.value = Number(st.progress) || 0;
  }

  const onStrata = () => {
    drawZone();
    drawVariables();
  };
  listen("change:strata", onStrata);
  listen("change:bins", drawZone);
  listen("change:_variables", onStrata);
  listen("change:_result", drawResult);
  listen("change:_status", drawStatus);
  listen("change:_transport", onTransport);
  const onView = () => {
    const key = model.get("view");
    if (key !== view && VIEWS.some(([k]) => k === key)) showView(key);
  };
  listen("change:view", onView);

  // -- focus across re-created views ---------------------------------------------------------------
  const memoryKey = model.get("_variables");
  const remember = (e) => {
    const place = focusPlace(e.target);
    if (place && memoryKey && typeof memoryKey === "object") focusMemory.set(memoryKey, { place, at: Date.now() });
  };
  const forget = (e) => {
    // Focus moved elsewhere on purpose (not lost with a removed view, where relatedTarget is null).
    if (e.relatedTarget && !root.contains(e.relatedTarget) && memoryKey && typeof memoryKey === "object") {
      focusMemory.delete(memoryKey);
    }
  };
  root.addEventListener("focusin", remember);
  root.addEventListener("focusout", forget);
  let frames = 0;
  let restoreTimer = null;
  const restore = () => {
    restoreTimer = null;
    if (!root.isConnected) {
      if (++frames < 20) restoreTimer = setTimeout(restore, 16);
      return;
    }
    const saved = memoryKey && typeof memoryKey === "object" ? focusMemory.get(memoryKey) : null;
    if (!saved || Date.now() - saved.at > FOCUS_MS) return;
    const active = document.activeElement;
    const lost = !active || active === document.body || (active.contains(root) && active !== root);
    if (!lost) return; // the user is somewhere else: leave focus alone
    const target = findPlace(root, saved.place);
    if (target && typeof target.focus === "function") target.focus();
  };
  restoreTimer = setTimeout(restore, 0);
  const onControl = () => drawControls();
  for (const name of ["method", "measure", "level", "interval", "n_boot"]) listen(`change:${name}`, onControl);

  drawVariables();
  drawZone();
  drawResult();
  drawStatus();
  showView(view);

  return () => {
    for (const [event, cb] of listeners) model.off(event, cb);
    listeners.length = 0;
    zone.removeEventListener("dragover", onDragOver);
    zone.removeEventListener("dragenter", onDragOver);
    zone.removeEventListener("dragleave", onDragLeave);
    zone.removeEventListener("drop", onDrop);
    root.removeEventListener("focusin", remember);
    root.removeEventListener("focusout", forget);
    if (restoreTimer !== null) clearTimeout(restoreTimer);
  };
}

export default { render };
