// Test helpers: a jsdom document as the global DOM, and a fake anywidget model.
import { JSDOM } from "jsdom";

export function installDom() {
  const dom = new JSDOM("<!doctype html><html><body></body></html>", { pretendToBeVisual: true });
  const { window } = dom;
  for (const key of ["window", "document", "Element", "HTMLElement", "Event", "KeyboardEvent", "MouseEvent", "Node"]) {
    globalThis[key] = key === "window" ? window : window[key];
  }
  return dom;
}

/** A fake model with the anywidget surface: get/set/on/off/save_changes, plus test helpers. */
export function fakeModel(state) {
  const values = { ...state };
  const handlers = new Map(); // event -> Set of callbacks
  const log = { on: [], off: [], saves: 0, sets: [] };
  return {
    get: (name) => values[name],
    set(name, value) {
      // Like Backbone: a local set fires change events at once; save_changes sends them.
      values[name] = value;
      log.sets.push([name, value]);
      this.fire(name);
    },
    save_changes() {
      log.saves += 1;
    },
    on(event, cb) {
      log.on.push([event, cb]);
      if (!handlers.has(event)) handlers.set(event, new Set());
      handlers.get(event).add(cb);
    },
    off(event, cb) {
      log.off.push([event, cb]);
      handlers.get(event)?.delete(cb);
    },
    /** Simulate Python writing a trait. */
    put(name, value) {
      values[name] = value;
      this.fire(name);
    },
    fire(name) {
      for (const cb of handlers.get(`change:${name}`) ?? []) cb();
    },
    handlerCount() {
      let n = 0;
      for (const set of handlers.values()) n += set.size;
      return n;
    },
    values,
    log,
  };
}

export function row(stratum, extra = {}) {
  return {
    stratum,
    n: 100,
    n_exposed: 40,
    n_unexposed: 60,
    mean_exposed: 0.5,
    mean_unexposed: 0.25,
    estimate: 0.25,
    se: 0.09,
    ci_low: 0.07,
    ci_high: 0.43,
    p_value: 0.006,
    status: "ok",
    levels: {},
    ...extra,
  };
}

export function result(rows, extra = {}) {
  return {
    spec: { method: "crude", measure: "rd", strata: [] },
    modifiers: [],
    exposure: "visited",
    outcome: "on_target",
    method: "crude",
    measure: "rd",
    measure_name: "risk difference",
    ratio: false,
    null: 0,
    level: 0.95,
    interval: "wald",
    scale_note: "risk difference; se on the same scale",
    title: "Effect of visited on on_target",
    rows,
    heterogeneity: [],
    response_types: [],
    diagnostics: [],
    notes: [],
    caution: "Subgroup findings are exploratory.",
    recipe: "import stratagem as sg\n",
    n_input: 100,
    n_dropped: 0,
    ...extra,
  };
}

export function baseState(extra = {}) {
  return {
    strata: [],
    bins: {},
    method: "crude",
    measure: null,
    level: 0.95,
    interval: "wald",
    n_boot: 1000,
    _variables: [
      { name: "sex", tag: "2 levels", ok: true, reason: "", kind: "levels" },
      { name: "age", tag: "numeric · 4 bins", ok: true, reason: "", kind: "numeric" },
      { name: "insulin", tag: "2 levels", ok: true, reason: "", kind: "levels" },
      { name: "id", tag: "4000 levels", ok: false, reason: "has 4000 levels (more than 20); group them first", kind: "many" },
    ],
    _result: result([row("overall")]),
    _status: { state: "idle", message: "", progress: 1 },
    ...extra,
  };
}

/** A plain Event carrying a fake dataTransfer (jsdom has no DragEvent/DataTransfer). */
export function dragEvent(type, data = {}) {
  const e = new Event(type, { bubbles: true, cancelable: true });
  const store = { ...data };
  e.dataTransfer = {
    setData: (k, v) => {
      store[k] = v;
    },
    getData: (k) => store[k] ?? "",
    dropEffect: "none",
    effectAllowed: "all",
    store,
  };
  return e;
}
