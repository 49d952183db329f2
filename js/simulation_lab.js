// stratagem simulation lab: the front end of stratagem.widgets.SimulationLab (anywidget ES module).
//
// The view draws what Python publishes (`_draw`, `_repeats`, `_status`, `_repeat_status`, `_choices`)
// and writes only the public inputs (`groups`, `confounding`, `n`, `seed`, `method`, `level`, `draws`,
// `repeating`) with model.set + model.save_changes. Nothing is estimated here: the numbers come from
// stratagem.simlab. Every string from the user or the data is inserted as text, never as HTML.
// No network, no imports.

/** @typedef {{ get(name: string): any, set(name: string, value: any): void,
 *   on(event: string, cb: Function): void, off(event: string, cb?: Function): void,
 *   save_changes(): void }} Model */

const SVG = "http://www.w3.org/2000/svg";
export const TYPES = ["doomed", "causal", "preventive", "immune"];
const EDITABLE = ["doomed", "causal", "preventive"]; // immune is the rest
const PLOT_W = 300;
const ROW_H = 30; // one table row per stratum; the plot draws three marks in it
const AXIS_H = 30;
const PAD = 10;
const DEFAULT_CHOICES = {
  methods: [["standardization", "standardization"], ["ipw", "IPW"], ["aipw", "AIPW"]],
  levels: [0.8, 0.9, 0.95, 0.99],
  types: TYPES,
  max_draws: 500,
  max_levels: 6,
  min_n: 50,
  max_n: 50000,
  modifier: "group",
};

// ---------------------------------------------------------------------------------------------
// Small helpers

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

const finite = (v) => v !== null && v !== undefined && Number.isFinite(v);

/** A number for reading: fixed decimals, "—" when missing. */
export function fmt(value, digits = 3) {
  return finite(value) ? value.toFixed(digits) : "—";
}

/** "0.123 (0.050 to 0.196)" */
export function fmtInterval(cell) {
  if (!cell) return "—";
  return `${fmt(cell.estimate)} (${fmt(cell.ci_low)} to ${fmt(cell.ci_high)})`;
}

/** Round to 1e-9 so that 1 - 0.3 - 0.1 - 0.05 reads 0.55, not 0.5499999999. */
const tidy = (v) => Math.round(v * 1e9) / 1e9;

/**
 * The shares of one level after editing `type` to `value`: immune takes the rest.
 * Returns {group, error}: error is a sentence when the edit cannot be kept.
 * @param {Record<string, any>} group
 * @param {string} type
 * @param {number} value
 */
export function editShare(group, type, value) {
  if (!Number.isFinite(value) || value < 0 || value > 1) {
    return { group, error: `The ${type} share must be a number from 0 to 1.` };
  }
  const next = { ...group, [type]: value };
  const used = EDITABLE.reduce((acc, t) => acc + Number(next[t] || 0), 0);
  const rest = tidy(1 - used);
  if (rest < 0) {
    return { group, error: `Doomed, causal and preventive add up to ${fmt(used, 2)} in ${group.level}: at most 1.` };
  }
  next.immune = rest;
  return { group: next, error: "" };
}

/** A new level to add: a fresh name, the shares of the last level, the mean weight. */
export function newLevel(groups) {
  const names = new Set(groups.map((g) => g.level));
  let k = groups.length + 1;
  while (names.has(`level ${k}`)) k += 1;
  const last = groups[groups.length - 1] || { doomed: 0.25, causal: 0.25, preventive: 0.0, immune: 0.5 };
  const weight = groups.length ? groups.reduce((a, g) => a + Number(g.weight || 0), 0) / groups.length : 1;
  return { level: `level ${k}`, weight: tidy(weight), doomed: last.doomed, causal: last.causal, preventive: last.preventive, immune: last.immune };
}

/**
 * Commit an input's edit on Enter as well as on "change" (blur), without committing twice.
 * @param {HTMLInputElement} input
 * @param {() => void} commit
 */
function onCommit(input, commit) {
  let committed = null;
  const run = () => {
    if (committed === input.value) return;
    committed = input.value;
    commit();
  };
  input.addEventListener("change", run);
  input.addEventListener("keydown", (event) => {
    if (event.key === "Enter") {
      event.preventDefault();
      run();
    }
  });
  input.addEventListener("focus", () => {
    committed = null;
  });
}

/** Pixel position of `v` on the plot's linear axis. */
export function xScale(domain, left, right) {
  const [d0, d1] = domain;
  return (v) => left + ((v - d0) / (d1 - d0)) * (right - left);
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
  const write = (name, value) => {
    model.set(name, value);
    model.save_changes();
  };
  const choices = () => ({ ...DEFAULT_CHOICES, ...(model.get("_choices") || {}) });

  const root = h("div", { class: "sg-lab" });
  el.replaceChildren(root);
  const title = h("div", { class: "sg-lab-title" }, "Simulation lab: does the estimator recover a truth we set?");
  const body = h("div", { class: "sg-lab-body" });
  root.append(title, body);

  // -- left: the truth and the draw's settings --------------------------------------------------
  const setupPane = h("section", { class: "sg-lab-setup", "aria-label": "The truth you set" });
  setupPane.append(h("h3", {}, "The truth you set"));
  const setupHint = h("p", { class: "sg-lab-hint" });
  const groupsTable = h("table", { class: "sg-lab-groups" });
  const groupsError = h("p", { class: "sg-lab-inline-error", role: "alert" });
  const addBtn = h("button", { type: "button", class: "sg-lab-add" }, "Add a level");
  const settings = h("div", { class: "sg-lab-settings" });
  const settingsError = h("p", { class: "sg-lab-inline-error", role: "alert" });
  const levelsPart = h("div", { class: "sg-lab-levels" });
  levelsPart.append(groupsTable, groupsError, addBtn);
  const settingsPart = h("div", { class: "sg-lab-settings-part" });
  settingsPart.append(settings, settingsError);
  const setupParts = h("div", { class: "sg-lab-setup-parts" });
  setupParts.append(levelsPart, settingsPart);
  setupPane.append(setupHint, setupParts);

  const setting = (label, node, after) => {
    const wrap = h("label", { class: "sg-lab-setting" });
    wrap.append(h("span", {}, label), node);
    if (after) wrap.append(after);
    settings.append(wrap);
    return node;
  };
  const confInput = h("input", { type: "range", min: "0", max: "1", step: "0.05", "data-control": "confounding" });
  const confValue = h("output", { class: "sg-lab-value" });
  setting("Confounding", confInput, confValue);
  const nInput = h("input", { type: "number", step: "100", "data-control": "n" });
  setting("People per draw", nInput);
  const seedInput = h("input", { type: "number", min: "0", step: "1", "data-control": "seed" });
  const newDraw = h("button", { type: "button", class: "sg-lab-new-draw" }, "New draw");
  setting("Random state", seedInput, newDraw);
  const methodSel = h("select", { "data-control": "method" });
  setting("Adjusted method", methodSel);
  const levelSel = h("select", { "data-control": "level" });
  setting("Interval level", levelSel);

  // -- right: one draw, many draws, code ----------------------------------------------------------
  const main = h("div", { class: "sg-lab-main" });
  const status = h("div", { class: "sg-lab-status", role: "status", "aria-live": "polite" });
  const message = h("div", { class: "sg-lab-message" });
  status.append(message);

  const one = h("section", { class: "sg-lab-one", "aria-label": "One draw" });
  const oneHead = h("h3", {}, "One draw");
  const legend = h("div", { class: "sg-lab-legend", "aria-hidden": "true" });
  for (const [cls, text] of [["sg-lab-key-truth", "true effect in this draw"], ["sg-lab-key-set", "effect you set"], ["sg-lab-key-crude", "crude"], ["sg-lab-key-adjusted", "adjusted"]]) {
    const item = h("span", { class: `sg-lab-key ${cls}` });
    item.append(h("i"), document.createTextNode(text));
    legend.append(item);
  }
  const oneGrid = h("div", { class: "sg-lab-grid" });
  const oneNote = h("p", { class: "sg-lab-hint" });
  one.append(oneHead, legend, oneGrid, oneNote);

  const many = h("section", { class: "sg-lab-many", "aria-label": "Many draws" });
  many.append(h("h3", {}, "Many draws: bias and coverage"));
  const manyBar = h("div", { class: "sg-lab-many-bar" });
  const drawsInput = h("input", { type: "number", min: "1", step: "50", "data-control": "draws" });
  const drawsLabel = h("label", { class: "sg-lab-setting" });
  drawsLabel.append(h("span", {}, "Draws"), drawsInput);
  const repeatBtn = h("button", { type: "button", class: "sg-lab-repeat" });
  const progress = h("progress", { class: "sg-lab-progress", max: "1", value: "0" });
  const progressText = h("span", { class: "sg-lab-progress-text" });
  manyBar.append(drawsLabel, repeatBtn, progress, progressText);
  const repeatMessage = h("p", { class: "sg-lab-repeat-message" });
  const manyTable = h("div", { class: "sg-lab-many-table" });
  many.append(manyBar, repeatMessage, manyTable);

  const codePane = h("section", { class: "sg-lab-code-pane", "aria-label": "Code" });
  const codeHead = h("div", { class: "sg-lab-code-bar" });
  const copy = h("button", { type: "button", class: "sg-lab-copy" }, "Copy");
  const copied = h("span", { class: "sg-lab-copied", role: "status" });
  codeHead.append(h("h3", {}, "Code"), copy, copied);
  const codeHint = h("p", { class: "sg-lab-hint" }, "These calls give the numbers above again.");
  const pre = h("pre", { class: "sg-lab-code" });
  codePane.append(codeHead, codeHint, pre);

  const caution = h("p", { class: "sg-lab-caution" });
  main.append(status, one, many, codePane, caution);
  body.append(setupPane, main);

  // -- levels table -------------------------------------------------------------------------------
  const groups = () => (model.get("groups") || []).map((g) => ({ ...g }));

  function drawGroups() {
    const active = /** @type {HTMLElement|null} */ (document.activeElement);
    const focusKey = active && groupsTable.contains(active) ? active.getAttribute("data-key") : null;
    const list = groups();
    const c = choices();
    setupHint.textContent = `Per level of ${c.modifier}: its weight (relative size) and the shares of the four ` +
      "response types (immune is the rest). The true effect is causal − preventive.";
    groupsTable.replaceChildren();
    const head = h("tr");
    for (const label of ["level", "weight", "doomed", "causal", "preventive", "immune", "effect", ""]) {
      head.append(h("th", { scope: "col" }, label));
    }
    const thead = h("thead");
    thead.append(head);
    const tbody = h("tbody");
    list.forEach((g, i) => {
      const tr = h("tr", { "data-index": String(i) });
      const name = h("input", { type: "text", class: "sg-lab-name", "data-key": `${i}:level`, "aria-label": `Name of level ${i + 1}` });
      name.value = String(g.level ?? "");
      onCommit(name, () => {
        const next = groups();
        next[i].level = name.value.trim();
        groupsError.textContent = "";
        write("groups", next);
      });
      const td0 = h("td");
      td0.append(name);
      tr.append(td0);
      const weight = h("input", { type: "number", min: "0", max: "1", step: "0.05", class: "sg-lab-num", "data-key": `${i}:weight`, "aria-label": `Share of people in ${g.level}` });
      weight.value = String(g.weight);
      onCommit(weight, () => {
        const v = Number(weight.value);
        if (!(v > 0 && v <= 1)) {
          groupsError.textContent = `The weight of ${g.level} must be above 0 and at most 1 (weights are rescaled to sum to 1).`;
          weight.setAttribute("aria-invalid", "true");
          return;
        }
        const next = groups();
        next[i].weight = v;
        groupsError.textContent = "";
        write("groups", next);
      });
      const td1 = h("td");
      td1.append(weight);
      tr.append(td1);
      for (const t of EDITABLE) {
        const input = h("input", { type: "number", min: "0", max: "1", step: "0.01", class: "sg-lab-num", "data-type": t, "data-key": `${i}:${t}`, "aria-label": `${t} share in ${g.level}` });
        input.value = String(g[t]);
        onCommit(input, () => {
          const { group, error } = editShare(groups()[i], t, Number(input.value));
          if (error || input.value.trim() === "") {
            groupsError.textContent = error || `The ${t} share must be a number from 0 to 1.`;
            input.setAttribute("aria-invalid", "true");
            return;
          }
          const next = groups();
          next[i] = group;
          groupsError.textContent = "";
          write("groups", next);
        });
        const td = h("td");
        td.append(input);
        tr.append(td);
      }
      tr.append(h("td", { class: "sg-lab-immune", "data-type": "immune" }, fmt(Number(g.immune), 2)));
      const effect = Number(g.causal) - Number(g.preventive);
      tr.append(h("td", { class: "sg-lab-effect", "data-field": "effect" }, fmt(effect, 2)));
      const tdEnd = h("td", { class: "sg-lab-row-end" });
      const bar = h("span", { class: "sg-lab-stack", role: "img", "aria-label": TYPES.map((t) => `${t} ${fmt(Number(g[t]), 2)}`).join(", ") });
      for (const t of TYPES) {
        const part = h("span", { class: `sg-lab-part sg-lab-${t}`, title: `${t}: ${fmt(Number(g[t]), 2)}` });
        part.style.width = `${tidy(Math.max(0, Math.min(1, Number(g[t]) || 0)) * 100)}%`;
        bar.append(part);
      }
      const remove = h("button", { type: "button", class: "sg-lab-remove", "data-key": `${i}:remove`, "aria-label": `Remove level ${g.level}`, title: "Remove this level" }, "×");
      remove.disabled = list.length <= 1;
      remove.addEventListener("click", () => {
        const next = groups();
        next.splice(i, 1);
        write("groups", next);
      });
      tdEnd.append(bar, remove);
      tr.append(tdEnd);
      tbody.append(tr);
    });
    groupsTable.append(thead, tbody);
    addBtn.disabled = list.length >= c.max_levels;
    addBtn.title = addBtn.disabled ? `At most ${c.max_levels} levels.` : "";
    if (focusKey) {
      const again = groupsTable.querySelector(`[data-key="${CSS_ESCAPE(focusKey)}"]`);
      if (again instanceof HTMLElement) again.focus();
    }
  }
  addBtn.addEventListener("click", () => {
    const list = groups();
    if (list.length >= choices().max_levels) return;
    write("groups", [...list, newLevel(list)]);
    const inputs = groupsTable.querySelectorAll(".sg-lab-name");
    const last = inputs[inputs.length - 1];
    if (last instanceof HTMLElement) last.focus();
  });

  // -- settings ---------------------------------------------------------------------------------------
  function drawSettings() {
    const c = choices();
    const conf = Number(model.get("confounding"));
    if (document.activeElement !== confInput) confInput.value = String(conf);
    confValue.textContent = fmt(conf, 2);
    nInput.min = String(c.min_n);
    nInput.max = String(c.max_n);
    if (document.activeElement !== nInput) nInput.value = String(model.get("n"));
    if (document.activeElement !== seedInput) seedInput.value = String(model.get("seed"));
    methodSel.replaceChildren();
    for (const [value, label] of c.methods) methodSel.append(h("option", { value }, label));
    methodSel.value = String(model.get("method"));
    levelSel.replaceChildren();
    for (const lv of c.levels) levelSel.append(h("option", { value: String(lv) }, `${Math.round(lv * 100)}%`));
    levelSel.value = String(model.get("level"));
    drawsInput.max = String(c.max_draws);
    if (document.activeElement !== drawsInput) drawsInput.value = String(model.get("draws"));
  }
  const wholeNumber = (input, name, lo, hi) => {
    const v = Number(input.value);
    if (!Number.isInteger(v) || v < lo || v > hi) {
      input.setAttribute("aria-invalid", "true");
      settingsError.textContent = `${name} must be a whole number from ${lo} to ${hi.toLocaleString("en-US")}.`;
      return null;
    }
    input.removeAttribute("aria-invalid");
    settingsError.textContent = "";
    return v;
  };
  confInput.addEventListener("input", () => {
    confValue.textContent = fmt(Number(confInput.value), 2);
  });
  confInput.addEventListener("change", () => write("confounding", Number(confInput.value)));
  onCommit(nInput, () => {
    const c = choices();
    const v = wholeNumber(nInput, "People per draw", c.min_n, c.max_n);
    if (v !== null) write("n", v);
  });
  onCommit(seedInput, () => {
    const v = wholeNumber(seedInput, "The random state", 0, 2 ** 31 - 1);
    if (v !== null) write("seed", v);
  });
  newDraw.addEventListener("click", () => write("seed", Number(model.get("seed")) + 1));
  methodSel.addEventListener("change", () => write("method", methodSel.value));
  levelSel.addEventListener("change", () => write("level", Number(levelSel.value)));
  onCommit(drawsInput, () => {
    const v = wholeNumber(drawsInput, "Draws", 1, choices().max_draws);
    if (v !== null) write("draws", v);
  });
  repeatBtn.addEventListener("click", () => write("repeating", !model.get("repeating")));

  // -- one draw ------------------------------------------------------------------------------------------
  function drawOne() {
    const d = model.get("_draw") || {};
    oneGrid.replaceChildren();
    const rows = d.rows || [];
    if (!rows.length) {
      oneGrid.append(h("p", { class: "sg-lab-hint" }, "No draw yet."));
      return;
    }
    oneHead.textContent = `One draw: ${Number(d.n).toLocaleString("en-US")} people, random state ${d.seed}`;
    const table = h("table", { class: "sg-lab-compare" });
    const head = h("tr");
    const pct = `${Math.round((d.level || 0.95) * 100)}%`;
    const cols = [["stratum", ""], ["n", "sg-num"], ["set", "sg-num"], ["true", "sg-num"], ["crude", "sg-num"], [`${d.method_label} (${pct} interval)`, "sg-num"]];
    for (const [label, cls] of cols) head.append(h("th", { scope: "col", class: cls }, label));
    const plotHead = h("th", { class: "sg-lab-plot-head", scope: "col" });
    head.append(plotHead);
    const thead = h("thead");
    thead.append(head);
    const tbody = h("tbody");
    const x = xScale(d.axis.domain, PAD, PLOT_W - PAD);
    rows.forEach((row, i) => {
      const tr = h("tr", { "data-stratum": row.stratum });
      if (row.stratum === "overall") tr.classList.add("sg-lab-overall");
      tr.append(h("td", { "data-field": "stratum", title: row.stratum }, row.stratum));
      tr.append(h("td", { class: "sg-num", "data-field": "n" }, finite(row.n) ? Math.round(row.n).toLocaleString("en-US") : "—"));
      tr.append(h("td", { class: "sg-num", "data-field": "set_effect" }, fmt(row.set_effect)));
      const truth = h("td", { class: "sg-num sg-lab-truth-cell", "data-field": "truth" }, fmt(row.truth));
      truth.setAttribute("data-value", String(row.truth));
      tr.append(truth);
      for (const role of ["crude", "adjusted"]) {
        const cell = row[role];
        const td = h("td", { class: `sg-num sg-lab-${role}-cell`, "data-field": role }, cell.status === "ok" ? fmtInterval(cell) : String(cell.status));
        td.setAttribute("data-value", String(cell.estimate));
        if (cell.covered === false) {
          td.classList.add("sg-lab-missed");
          td.title = "The interval misses the true effect of this draw.";
        }
        tr.append(td);
      }
      if (i === 0) {
        const plotCell = h("td", { class: "sg-lab-plot-cell", rowspan: String(rows.length) });
        plotCell.append(drawPlot(rows, d.axis, x));
        tr.append(plotCell);
      }
      tbody.append(tr);
    });
    plotHead.append(drawAxis(d.axis, x));
    table.append(thead, tbody);
    oneGrid.append(table);
    oneNote.textContent = `Risk differences. "set" is causal − preventive as you set it; "true" is the mean of y1 − y0 ` +
      `in this draw (method "exact"). Confounding ${fmt(d.confounding, 2)}. A struck-through interval misses the true effect.`;
    caution.textContent = d.caution || "";
  }

  function drawAxis(ax, x) {
    const svg = s("svg", { class: "sg-lab-axis", width: PLOT_W, height: AXIS_H, viewBox: `0 0 ${PLOT_W} ${AXIS_H}`, "aria-hidden": "true" });
    svg.append(s("text", { class: "sg-lab-axis-title", x: PLOT_W / 2, y: 11, "text-anchor": "middle" }, "risk difference"));
    for (const tick of ax.ticks || []) {
      const xt = x(tick);
      svg.append(s("text", { x: xt, y: AXIS_H - 7, "text-anchor": "middle" }, String(tick)));
      svg.append(s("line", { class: "sg-lab-tick", x1: xt, x2: xt, y1: AXIS_H - 4, y2: AXIS_H }));
    }
    return svg;
  }

  function drawPlot(rows, ax, x) {
    const height = ROW_H * rows.length;
    const svg = s("svg", { class: "sg-lab-plot", width: PLOT_W, height, viewBox: `0 0 ${PLOT_W} ${height}`, role: "img" });
    svg.setAttribute("aria-label", "True effect, crude and adjusted estimates with intervals, per stratum");
    for (const tick of ax.ticks || []) {
      const xt = x(tick);
      svg.append(s("line", { class: tick === 0 ? "sg-lab-null" : "sg-lab-tick", x1: xt, x2: xt, y1: 0, y2: height }));
    }
    rows.forEach((row, i) => {
      const top = ROW_H * i;
      const g = s("g", { class: "sg-lab-row", "data-stratum": row.stratum });
      if (finite(row.truth)) {
        const xt = x(row.truth);
        const line = s("line", { class: "sg-lab-truth", x1: xt, x2: xt, y1: top + 3, y2: top + ROW_H - 3, "data-x": xt });
        line.append(s("title", {}, `${row.stratum}: true effect ${fmt(row.truth)}`));
        g.append(line);
      }
      if (finite(row.set_effect)) {
        const xs = x(row.set_effect);
        const cy = top + ROW_H / 2;
        const mark = s("path", { class: "sg-lab-set", d: `M${xs} ${cy - 4}L${xs + 4} ${cy}L${xs} ${cy + 4}L${xs - 4} ${cy}Z`, "data-x": xs });
        mark.append(s("title", {}, `${row.stratum}: effect you set ${fmt(row.set_effect)}`));
        g.append(mark);
      }
      [["crude", top + ROW_H * 0.3], ["adjusted", top + ROW_H * 0.7]].forEach(([role, cy]) => {
        const cell = row[role];
        if (cell.status !== "ok" || !finite(cell.estimate)) return;
        const sub = s("g", { class: `sg-lab-${role}` });
        if (finite(cell.ci_low) && finite(cell.ci_high)) {
          sub.append(s("line", { class: "sg-lab-ci", x1: x(cell.ci_low), x2: x(cell.ci_high), y1: cy, y2: cy }));
        }
        const xe = x(cell.estimate);
        const point = role === "crude"
          ? s("circle", { class: "sg-lab-point", cx: xe, cy, r: 3.5, "data-x": xe })
          : s("rect", { class: "sg-lab-point", x: xe - 3.5, y: cy - 3.5, width: 7, height: 7, "data-x": xe });
        point.append(s("title", {}, `${row.stratum}, ${role}: ${fmtInterval(cell)}`));
        sub.append(point);
        g.append(sub);
      });
      svg.append(g);
    });
    return svg;
  }

  // -- many draws -------------------------------------------------------------------------------------------
  function drawMany() {
    const r = model.get("_repeats") || {};
    manyTable.replaceChildren();
    const rows = r.rows || [];
    if (!rows.length) {
      manyTable.append(h("p", { class: "sg-lab-hint" },
        "Repeat the draw many times (random states seed, seed + 1, …) to see each method's bias and how often its intervals hold the truth."));
      return;
    }
    const nominal = r.level || 0.95;
    manyTable.append(h("p", { class: "sg-lab-hint" },
      `${r.draws} draws from random state ${r.seed}. Bias: mean of estimate − true effect (± Monte Carlo error). ` +
      `Coverage: share of ${Math.round(nominal * 100)}% intervals holding the true effect (the line marks ${Math.round(nominal * 100)}%).`));
    const table = h("table", { class: "sg-lab-repeats" });
    const head = h("tr");
    for (const [label, cls] of [["method", ""], ["stratum", ""], ["bias", "sg-num"], ["coverage", "sg-num"], ["", ""], ["RMSE", "sg-num"], ["mean width", "sg-num"], ["draws", "sg-num"]]) {
      head.append(h("th", { scope: "col", class: cls }, label));
    }
    const thead = h("thead");
    thead.append(head);
    const tbody = h("tbody");
    rows.forEach((row, i) => {
      const tr = h("tr", { "data-role": String(row.role), "data-stratum": String(row.stratum) });
      if (i > 0 && rows[i - 1].role !== row.role) tr.classList.add("sg-lab-first");
      tr.append(h("td", { "data-field": "method" }, row.role === "adjusted" ? String(r.method_label) : String(row.method)));
      tr.append(h("td", { "data-field": "stratum" }, String(row.stratum)));
      const bias = h("td", { class: "sg-num", "data-field": "bias" }, `${fmt(row.bias)} ± ${fmt(row.bias_mcse)}`);
      bias.setAttribute("data-value", String(row.bias));
      tr.append(bias);
      const cov = h("td", { class: "sg-num", "data-field": "coverage" }, finite(row.coverage) ? `${(row.coverage * 100).toFixed(1)}%` : "—");
      cov.setAttribute("data-value", String(row.coverage));
      tr.append(cov);
      const barCell = h("td", { class: "sg-lab-cov-cell" });
      const bar = h("span", { class: "sg-lab-cov", role: "img", "aria-label": `coverage ${fmt(row.coverage, 3)} against ${nominal}` });
      const fill = h("span", { class: "sg-lab-cov-fill" });
      fill.style.width = `${Math.max(0, Math.min(1, row.coverage || 0)) * 100}%`;
      if (finite(row.coverage) && row.coverage < nominal - 3 * Math.max(row.coverage_mcse || 0, Math.sqrt(nominal * (1 - nominal) / Math.max(row.draws, 1)))) {
        fill.classList.add("sg-lab-cov-low");
      }
      const mark = h("span", { class: "sg-lab-cov-nominal" });
      mark.style.left = `${nominal * 100}%`;
      bar.append(fill, mark);
      barCell.append(bar);
      tr.append(barCell);
      tr.append(h("td", { class: "sg-num", "data-field": "rmse" }, fmt(row.rmse)));
      tr.append(h("td", { class: "sg-num", "data-field": "mean_width" }, fmt(row.mean_width)));
      tr.append(h("td", { class: "sg-num", "data-field": "draws" }, row.failed ? `${row.draws} (${row.failed} failed)` : String(row.draws)));
      tbody.append(tr);
    });
    table.append(thead, tbody);
    manyTable.append(table);
  }

  function drawRepeatStatus() {
    const st = model.get("_repeat_status") || { state: "idle" };
    const running = st.state === "running";
    const asked = !!model.get("repeating");
    repeatBtn.textContent = running || asked ? "Stop" : "Repeat";
    repeatBtn.setAttribute("aria-pressed", String(running || asked));
    progress.hidden = !running;
    progress.value = Number(st.progress) || 0;
    progressText.textContent = running ? `${st.done ?? 0} of ${st.draws ?? "?"} draws` : "";
    repeatMessage.textContent = st.message || "";
    repeatMessage.classList.toggle("sg-lab-error", st.state === "error");
    manyTable.classList.toggle("sg-lab-dim", running);
  }

  // -- code ------------------------------------------------------------------------------------------------------
  function drawCode() {
    const d = model.get("_draw") || {};
    const r = model.get("_repeats") || {};
    let text = d.code || "";
    if (r.code) text += `\n# Many draws\n${r.code}`;
    pre.textContent = text;
    copied.textContent = "";
  }
  copy.addEventListener("click", async () => {
    const text = pre.textContent || "";
    try {
      await navigator.clipboard.writeText(text);
      copied.textContent = "Copied.";
    } catch {
      const range = document.createRange();
      range.selectNodeContents(pre);
      const sel = window.getSelection();
      sel?.removeAllRanges();
      sel?.addRange(range);
      copied.textContent = "Selected: press Ctrl+C to copy.";
    }
  });

  function drawStatus() {
    const st = model.get("_status") || { state: "idle" };
    const error = st.state === "error";
    root.classList.toggle("sg-lab-stale", error);
    root.classList.toggle("sg-lab-running", st.state === "running");
    message.textContent = error ? st.message || "Error." : "";
    message.hidden = !error;
  }

  const onDraw = () => {
    drawOne();
    drawCode();
  };
  const onRepeats = () => {
    drawMany();
    drawCode();
  };
  listen("change:groups", drawGroups);
  listen("change:_choices", drawGroups);
  listen("change:_draw", onDraw);
  listen("change:_repeats", onRepeats);
  listen("change:_status", drawStatus);
  listen("change:_repeat_status", drawRepeatStatus);
  listen("change:repeating", drawRepeatStatus);
  for (const name of ["confounding", "n", "seed", "method", "level", "draws", "_choices"]) listen(`change:${name}`, drawSettings);

  drawGroups();
  drawSettings();
  onDraw();
  drawMany();
  drawStatus();
  drawRepeatStatus();

  return () => {
    for (const [event, cb] of listeners) model.off(event, cb);
    listeners.length = 0;
  };
}

/** CSS.escape where available (browsers), else a safe fallback for our own data-key values. */
function CSS_ESCAPE(value) {
  if (globalThis.CSS && typeof globalThis.CSS.escape === "function") return globalThis.CSS.escape(value);
  return String(value).replace(/["\\]/g, "\\$&");
}

export default { render };
