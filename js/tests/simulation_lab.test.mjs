// Unit tests of js/simulation_lab.js against jsdom and a fake model (node --test).
import { test, beforeEach } from "node:test";
import assert from "node:assert/strict";
import { installDom, fakeModel } from "./helpers.mjs";

installDom();
const { default: widget, editShare, newLevel, xScale, fmtInterval } = await import("../simulation_lab.js");

const HOSTILE = "<img src=x onerror=alert(1)>";

function cell(estimate, lo, hi, extra = {}) {
  return { estimate, ci_low: lo, ci_high: hi, se: 0.03, status: "ok", covered: true, error: 0, ...extra };
}

function drawPayload(extra = {}) {
  return {
    rows: [
      { stratum: "group=low", modifier_level: "low", n: 1000, set_effect: 0.05, truth: 0.052,
        crude: cell(0.25, 0.19, 0.31, { covered: false }), adjusted: cell(0.06, 0.0, 0.12) },
      { stratum: "group=high", modifier_level: "high", n: 1000, set_effect: 0.2, truth: 0.198,
        crude: cell(0.37, 0.31, 0.42, { covered: false }), adjusted: cell(0.18, 0.11, 0.24) },
      { stratum: "overall", modifier_level: "overall", n: 2000, set_effect: 0.125, truth: 0.125,
        crude: cell(0.31, 0.27, 0.35, { covered: false }), adjusted: cell(0.12, 0.08, 0.17) },
    ],
    axis: { domain: [-0.02, 0.44], ticks: [0, 0.1, 0.2, 0.3, 0.4] },
    modifier: "group",
    method: "aipw",
    method_label: "AIPW",
    level: 0.95,
    seed: 3,
    n: 2000,
    confounding: 0.5,
    code: "import stratagem as sg\ndf = sg.simulate(n=2000, seed=3)\n",
    caution: "Subgroup findings are exploratory.",
    ...extra,
  };
}

function repeatsPayload() {
  const rows = [];
  for (const [role, method, bias, coverage] of [["crude", "crude", 0.2, 0.0], ["adjusted", "aipw", 0.003, 0.95]]) {
    for (const stratum of ["group=low", "group=high", "overall"]) {
      rows.push({ role, method, stratum, modifier_level: stratum, draws: 40, failed: 0, mean_truth: 0.1, set_effect: 0.1,
        bias, bias_mcse: 0.004, rmse: 0.03, coverage, coverage_mcse: 0.03, mean_width: 0.12 });
    }
  }
  return { rows, draws: 40, seed: 3, level: 0.95, method: "aipw", method_label: "AIPW",
    code: "from stratagem.simlab import LabSetup, repeat_draws\nruns = repeat_draws(setup, draws=40, seed=3)\n" };
}

function state(extra = {}) {
  return {
    groups: [
      { level: "low", weight: 0.5, doomed: 0.3, causal: 0.1, preventive: 0.05, immune: 0.55 },
      { level: "high", weight: 0.5, doomed: 0.3, causal: 0.25, preventive: 0.05, immune: 0.4 },
    ],
    confounding: 0.5,
    n: 2000,
    seed: 3,
    method: "aipw",
    level: 0.95,
    draws: 100,
    repeating: false,
    _draw: drawPayload(),
    _repeats: {},
    _status: { state: "idle", message: "" },
    _repeat_status: { state: "idle", message: "", progress: 0, done: 0, draws: 0 },
    _choices: {
      methods: [["standardization", "standardization"], ["ipw", "IPW"], ["aipw", "AIPW"]],
      levels: [0.8, 0.9, 0.95, 0.99], types: ["doomed", "causal", "preventive", "immune"],
      max_draws: 500, max_levels: 6, min_n: 50, max_n: 50000, modifier: "group",
    },
    ...extra,
  };
}

let el;
beforeEach(() => {
  document.body.replaceChildren();
  el = document.createElement("div");
  document.body.append(el);
});

function mount(extra = {}) {
  const model = fakeModel(state(extra));
  const cleanup = widget.render({ model, el });
  return { model, cleanup, root: el.querySelector(".sg-lab") };
}

function change(input, value) {
  input.value = String(value);
  input.dispatchEvent(new Event("change", { bubbles: true }));
}

test("editShare: immune takes the rest; impossible edits are refused with a reason", () => {
  const g = { level: "low", weight: 0.5, doomed: 0.3, causal: 0.1, preventive: 0.05, immune: 0.55 };
  const ok = editShare(g, "causal", 0.2);
  assert.equal(ok.error, "");
  assert.equal(ok.group.causal, 0.2);
  assert.equal(ok.group.immune, 0.45);
  const over = editShare(g, "doomed", 0.9);
  assert.match(over.error, /add up to 1\.05 in low: at most 1/);
  assert.equal(over.group, g, "the group is unchanged when refused");
  assert.match(editShare(g, "causal", -0.1).error, /from 0 to 1/);
  assert.match(editShare(g, "causal", Number.NaN).error, /from 0 to 1/);
});

test("newLevel: a fresh name, the last level's shares, the mean weight", () => {
  const groups = state().groups;
  const added = newLevel(groups);
  assert.equal(added.level, "level 3");
  assert.equal(added.weight, 0.5);
  assert.deepEqual([added.doomed, added.causal, added.preventive, added.immune], [0.3, 0.25, 0.05, 0.4]);
  assert.equal(newLevel([...groups, { ...added }]).level, "level 4");
});

test("xScale maps the domain onto the pixel range", () => {
  const x = xScale([-0.1, 0.3], 10, 210);
  assert.equal(x(-0.1), 10);
  assert.equal(x(0.3), 210);
  assert.ok(Math.abs(x(0.1) - 110) < 1e-9);
});

test("the levels table shows every level with its shares, effect and remainder", () => {
  const { root } = mount();
  const rows = root.querySelectorAll(".sg-lab-groups tbody tr");
  assert.equal(rows.length, 2);
  assert.equal(rows[0].querySelector(".sg-lab-name").value, "low");
  assert.equal(rows[1].querySelector('input[data-type="causal"]').value, "0.25");
  assert.equal(rows[0].querySelector(".sg-lab-immune").textContent, "0.55");
  assert.equal(rows[1].querySelector('[data-field="effect"]').textContent, "0.20");
  const parts = rows[0].querySelectorAll(".sg-lab-stack .sg-lab-part");
  assert.deepEqual([...parts].map((p) => p.style.width), ["30%", "10%", "5%", "55%"]);
});

test("editing a share saves groups with immune recomputed", () => {
  const { model, root } = mount();
  const input = root.querySelector('.sg-lab-groups tbody tr[data-index="0"] input[data-type="causal"]');
  change(input, 0.2);
  const groups = model.get("groups");
  assert.equal(groups[0].causal, 0.2);
  assert.equal(groups[0].immune, 0.45);
  assert.equal(groups[1].causal, 0.25, "other levels untouched");
  assert.ok(model.log.saves >= 1);
  // re-rendered from the trait
  assert.equal(root.querySelector('tr[data-index="0"] .sg-lab-immune').textContent, "0.45");
});

test("an edit that breaks the shares is refused: nothing saved, the reason shown", () => {
  const { model, root } = mount();
  const before = model.get("groups");
  const input = root.querySelector('tr[data-index="1"] input[data-type="doomed"]');
  change(input, 0.8);
  assert.equal(model.get("groups"), before);
  assert.equal(model.log.saves, 0);
  assert.match(root.querySelector(".sg-lab-inline-error").textContent, /add up to 1\.10 in high/);
  assert.equal(input.getAttribute("aria-invalid"), "true");
});

test("renaming, weighting, adding and removing levels write groups", () => {
  const { model, root } = mount();
  change(root.querySelector('tr[data-index="1"] .sg-lab-name'), "  top ");
  assert.equal(model.get("groups")[1].level, "top");
  change(root.querySelector('tr[data-index="0"] input[data-key="0:weight"]'), 0.7);
  assert.equal(model.get("groups")[0].weight, 0.7);
  change(root.querySelector('tr[data-index="0"] input[data-key="0:weight"]'), 0);
  assert.equal(model.get("groups")[0].weight, 0.7, "a weight of 0 is refused");
  root.querySelector(".sg-lab-add").click();
  assert.equal(model.get("groups").length, 3);
  assert.equal(root.querySelectorAll(".sg-lab-groups tbody tr").length, 3);
  root.querySelector('tr[data-index="0"] .sg-lab-remove').click();
  assert.deepEqual(model.get("groups").map((g) => g.level), ["top", "level 3"]);
});

test("at most max_levels levels; the last level cannot be removed", () => {
  const one = [{ level: "only", weight: 1, doomed: 0.2, causal: 0.2, preventive: 0, immune: 0.6 }];
  const { root } = mount({ groups: one, _choices: { ...state()._choices, max_levels: 1 } });
  assert.equal(root.querySelector(".sg-lab-remove").disabled, true);
  assert.equal(root.querySelector(".sg-lab-add").disabled, true);
});

test("settings write their traits; bad whole numbers are refused with a message", () => {
  const { model, root } = mount();
  change(root.querySelector('[data-control="confounding"]'), 0.8);
  assert.equal(model.get("confounding"), 0.8);
  change(root.querySelector('[data-control="n"]'), 500);
  assert.equal(model.get("n"), 500);
  change(root.querySelector('[data-control="n"]'), 12.5);
  assert.equal(model.get("n"), 500);
  assert.match(root.querySelector(".sg-lab-setup").textContent, /People per draw must be a whole number from 50 to 50,000/);
  change(root.querySelector('[data-control="method"]'), "ipw");
  assert.equal(model.get("method"), "ipw");
  change(root.querySelector('[data-control="level"]'), "0.9");
  assert.equal(model.get("level"), 0.9);
  root.querySelector(".sg-lab-new-draw").click();
  assert.equal(model.get("seed"), 4);
  change(root.querySelector('[data-control="draws"]'), 600);
  assert.equal(model.get("draws"), 100, "more than max_draws is refused");
  change(root.querySelector('[data-control="draws"]'), 250);
  assert.equal(model.get("draws"), 250);
});

test("the one-draw table shows truth, crude and adjusted with intervals; missed intervals are marked", () => {
  const { root } = mount();
  const rows = root.querySelectorAll(".sg-lab-compare tbody tr");
  assert.deepEqual([...rows].map((r) => r.getAttribute("data-stratum")), ["group=low", "group=high", "overall"]);
  const low = rows[0];
  assert.equal(low.querySelector('[data-field="truth"]').textContent, "0.052");
  assert.equal(low.querySelector('[data-field="set_effect"]').textContent, "0.050");
  assert.equal(low.querySelector('[data-field="adjusted"]').textContent, "0.060 (0.000 to 0.120)");
  assert.ok(low.querySelector('[data-field="crude"]').classList.contains("sg-lab-missed"));
  assert.ok(!low.querySelector('[data-field="adjusted"]').classList.contains("sg-lab-missed"));
  assert.ok(rows[2].classList.contains("sg-lab-overall"));
  assert.match(root.querySelector(".sg-lab-compare thead").textContent, /AIPW \(95% interval\)/);
  assert.equal(fmtInterval(drawPayload().rows[1].crude), "0.370 (0.310 to 0.420)");
});

test("the plot places truth, crude and adjusted marks on the shared axis", () => {
  const { root } = mount();
  const svg = root.querySelector("svg.sg-lab-plot");
  assert.equal(Number(svg.getAttribute("height")), 90);
  const x = xScale([-0.02, 0.44], 10, 290);
  const low = svg.querySelector('g.sg-lab-row[data-stratum="group=low"]');
  assert.ok(Math.abs(Number(low.querySelector(".sg-lab-truth").getAttribute("data-x")) - x(0.052)) < 1e-9);
  assert.ok(Math.abs(Number(low.querySelector(".sg-lab-crude .sg-lab-point").getAttribute("data-x")) - x(0.25)) < 1e-9);
  assert.ok(Math.abs(Number(low.querySelector(".sg-lab-adjusted .sg-lab-point").getAttribute("data-x")) - x(0.06)) < 1e-9);
  const ci = low.querySelector(".sg-lab-adjusted .sg-lab-ci");
  assert.ok(Math.abs(Number(ci.getAttribute("x2")) - x(0.12)) < 1e-9);
  assert.equal(svg.querySelectorAll(".sg-lab-null").length, 1, "a dashed line at no effect");
  const ticks = [...root.querySelectorAll("svg.sg-lab-axis text")].map((t) => t.textContent);
  assert.deepEqual(ticks, ["risk difference", "0", "0.1", "0.2", "0.3", "0.4"]);
});

test("a stratum without an estimate shows its status instead of numbers and draws no mark", () => {
  const payload = drawPayload();
  payload.rows[0].adjusted = { estimate: null, ci_low: null, ci_high: null, se: null, status: "no exposed people", covered: null, error: null };
  const { root } = mount({ _draw: payload });
  const low = root.querySelector('.sg-lab-compare tr[data-stratum="group=low"]');
  assert.equal(low.querySelector('[data-field="adjusted"]').textContent, "no exposed people");
  assert.equal(root.querySelector('g.sg-lab-row[data-stratum="group=low"] .sg-lab-adjusted'), null);
});

test("Repeat asks for the draws; while running the button stops them and progress shows", () => {
  const { model, root } = mount();
  const btn = root.querySelector(".sg-lab-repeat");
  assert.equal(btn.textContent, "Repeat");
  assert.match(root.querySelector(".sg-lab-many-table").textContent, /Repeat the draw many times/);
  btn.click();
  assert.equal(model.get("repeating"), true);
  model.put("_repeat_status", { state: "running", message: "", progress: 0.25, done: 25, draws: 100 });
  assert.equal(btn.textContent, "Stop");
  assert.equal(root.querySelector(".sg-lab-progress").hidden, false);
  assert.equal(root.querySelector(".sg-lab-progress").value, 0.25);
  assert.equal(root.querySelector(".sg-lab-progress-text").textContent, "25 of 100 draws");
  btn.click();
  assert.equal(model.get("repeating"), false);
  model.put("_repeat_status", { state: "stopped", message: "Stopped: press Repeat to start again.", progress: 0, done: 0, draws: 100 });
  assert.equal(btn.textContent, "Repeat");
  assert.equal(root.querySelector(".sg-lab-progress").hidden, true);
  assert.equal(root.querySelector(".sg-lab-repeat-message").textContent, "Stopped: press Repeat to start again.");
});

test("the repeats table shows bias and coverage per method and stratum; low coverage is flagged", () => {
  const { model, root } = mount();
  model.put("_repeats", repeatsPayload());
  const rows = root.querySelectorAll(".sg-lab-repeats tbody tr");
  assert.equal(rows.length, 6);
  assert.equal(rows[0].querySelector('[data-field="method"]').textContent, "crude");
  assert.equal(rows[3].querySelector('[data-field="method"]').textContent, "AIPW");
  assert.ok(rows[3].classList.contains("sg-lab-first"));
  assert.equal(rows[0].querySelector('[data-field="bias"]').textContent, "0.200 ± 0.004");
  assert.equal(rows[3].querySelector('[data-field="coverage"]').textContent, "95.0%");
  assert.ok(rows[0].querySelector(".sg-lab-cov-fill").classList.contains("sg-lab-cov-low"));
  assert.ok(!rows[3].querySelector(".sg-lab-cov-fill").classList.contains("sg-lab-cov-low"));
  assert.equal(rows[3].querySelector(".sg-lab-cov-nominal").style.left, "95%");
  assert.match(root.querySelector(".sg-lab-code").textContent, /repeat_draws\(setup, draws=40, seed=3\)/);
});

test("code shows the pure calls of the draw (and of the repeats)", () => {
  const { model, root } = mount();
  assert.equal(root.querySelector(".sg-lab-code").textContent, drawPayload().code);
  model.put("_repeats", repeatsPayload());
  assert.ok(root.querySelector(".sg-lab-code").textContent.startsWith(drawPayload().code));
  model.put("_repeats", {});
  assert.equal(root.querySelector(".sg-lab-code").textContent, drawPayload().code);
});

test("an error keeps the last draw on screen, dimmed, with the message", () => {
  const { model, root } = mount();
  model.put("_status", { state: "error", message: "The shares of level 'low' sum to 1.2; they must sum to 1." });
  assert.ok(root.classList.contains("sg-lab-stale"));
  assert.match(root.querySelector(".sg-lab-message").textContent, /sum to 1\.2/);
  assert.equal(root.querySelectorAll(".sg-lab-compare tbody tr").length, 3);
  model.put("_status", { state: "idle", message: "" });
  assert.ok(!root.classList.contains("sg-lab-stale"));
  assert.equal(root.querySelector(".sg-lab-message").hidden, true);
});

test("strings from the user and the data are text, never HTML", () => {
  const payload = drawPayload();
  payload.rows[0].stratum = `group=${HOSTILE}`;
  payload.code = HOSTILE;
  const groups = state().groups.map((g, i) => (i === 0 ? { ...g, level: HOSTILE } : g));
  const { root } = mount({ _draw: payload, groups, _status: { state: "error", message: HOSTILE } });
  assert.equal(root.querySelector("img"), null);
  assert.equal(root.querySelector('tr[data-index="0"] .sg-lab-name').value, HOSTILE);
  assert.equal(root.querySelector(".sg-lab-compare tbody td").textContent, `group=${HOSTILE}`);
  assert.equal(root.querySelector(".sg-lab-code").textContent, HOSTILE);
  assert.equal(root.querySelector(".sg-lab-message").textContent, HOSTILE);
});

test("keyboard: every control is a native, focusable element with a label", () => {
  const { root } = mount();
  for (const node of root.querySelectorAll("input, select, button")) {
    assert.ok(node.tabIndex >= 0, `${node.outerHTML} is focusable`);
    const labelled = node.closest("label") || node.getAttribute("aria-label") || node.textContent.trim();
    assert.ok(labelled, `${node.outerHTML} has a label`);
  }
});

test("cleanup pairs every model.on with model.off", () => {
  const { model, cleanup } = mount();
  assert.ok(model.log.on.length >= 10);
  cleanup();
  assert.equal(model.handlerCount(), 0);
  assert.equal(model.log.off.length, model.log.on.length);
});

test("Enter commits an edit once (the later change event does not write again)", () => {
  const { model, root } = mount();
  const input = root.querySelector('[data-control="n"]');
  input.dispatchEvent(new Event("focus"));
  input.value = "700";
  const enter = new KeyboardEvent("keydown", { key: "Enter", bubbles: true, cancelable: true });
  input.dispatchEvent(enter);
  assert.equal(model.get("n"), 700);
  assert.equal(enter.defaultPrevented, true);
  const saves = model.log.saves;
  input.dispatchEvent(new Event("change", { bubbles: true }));
  assert.equal(model.log.saves, saves);
  const share = root.querySelector('tr[data-index="0"] input[data-type="preventive"]');
  share.value = "0";
  share.dispatchEvent(new KeyboardEvent("keydown", { key: "Enter", bubbles: true }));
  assert.equal(model.get("groups")[0].preventive, 0);
  assert.equal(model.get("groups")[0].immune, 0.6);
});
