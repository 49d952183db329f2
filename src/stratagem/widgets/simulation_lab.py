"""The simulation lab: set a known truth, draw a population, see whether estimators recover it.

Traits, in three kinds (as in the Explorer):

* public inputs the front end writes: ``groups`` (per level of the modifier: its name, its share of
  the population and the shares of the four response types), ``confounding``, ``n``, ``seed``,
  ``method`` (the adjusted method), ``level``, ``draws`` and ``repeating`` (True asks for the
  repeated draws, False stops them);
* derived state Python writes: ``_draw`` (one draw: truth, crude and adjusted per stratum, the code),
  ``_repeats`` (bias and coverage per method and stratum, the code), ``_status`` and
  ``_repeat_status``, ``_choices`` (the options and bounds the controls offer);
* Python-only: :attr:`SimulationLab.setup`, :attr:`~SimulationLab.result`,
  :attr:`~SimulationLab.comparison`, :attr:`~SimulationLab.repeats`.

Every number shown comes from :func:`stratagem.simlab.draw` / :func:`~stratagem.simlab.compare` and
:func:`stratagem.simlab.repeat_draws`, run on worker threads (:class:`~.worker.Runner`) so the newest
request supersedes older ones; the view also shows the code that gives the same numbers again.
"""

from __future__ import annotations

import html
import math
import threading
import time
from collections.abc import Mapping

import anywidget
import pandas as pd
import traitlets

from ..errors import SpecError, StratagemError
from ..results import CAUTION
from ..simlab import ADJUSTED_METHODS, DEFAULT_SHARES, TYPES, LabDraw, LabSetup, compare, draw, repeat_draws
from .display import SnapshotDisplay
from .explorer import front_end_file
from .payload import plain, records
from .snapshot import nice_ticks
from .worker import Outcome, Runner, kernel_post

__all__ = ["SimulationLab", "MAX_DRAWS", "MAX_LEVELS", "MAX_N"]

MAX_DRAWS = 500  # repeated draws per request
MAX_LEVELS = 6  # levels of the modifier
MAX_N = 50_000  # people per draw
MIN_N = 50
_PROGRESS_INTERVAL = 0.15  # publish repeat progress at most this often (s)

_METHOD_LABELS = {"standardization": "standardization", "ipw": "IPW", "aipw": "AIPW"}


def _friendly(exc: BaseException) -> str:
    if isinstance(exc, StratagemError):
        return str(exc)
    return f"The simulation failed ({type(exc).__name__}: {exc}). Change a setting or report this as a bug."


def _groups_from(shares: Mapping, weights: Mapping | None) -> list[dict]:
    setup = LabSetup(shares=shares, weights=weights)  # validates
    total = sum(setup.weights.values())
    return [{"level": k, "weight": setup.weights[k] / total, **setup.shares[k]} for k in setup.shares]


def _cleared(reason: str, _check) -> str:
    return reason


class SimulationLab(SnapshotDisplay, anywidget.AnyWidget):
    """A lab for checking estimators on populations whose truth is known.

    Set, per level of a modifier, the shares of the four response types (doomed, causal,
    preventive, immune; the true effect in a level is causal - preventive), how strongly the
    covariates confound the exposure, and the sample size. The lab draws a population with
    :func:`stratagem.simulate` and shows, per stratum, the true effect (``method="exact"``), the
    crude estimate and the adjusted estimate with their intervals. "Repeat" draws again many
    times (:func:`stratagem.simlab.repeat_draws`) and shows bias and interval coverage.

    Parameters
    ----------
    shares : mapping, optional
        Level -> shares of the four response types (see :class:`~stratagem.simlab.LabSetup`).
    weights : mapping, optional
        Level -> share of the population; equal by default.
    n : int
        People per draw (50 to 50,000).
    confounding : float in [0, 1]
    method : {"standardization", "ipw", "aipw"}
        The adjusted method.
    level : float
        Confidence level of the intervals.
    seed : int
        Random state of the draw on screen; the repeated draws use ``seed, seed + 1, ...``.
    draws : int
        Number of repeated draws (1 to 500).
    modifier : str
        Name of the modifier column.
    sync : bool
        Compute on the calling thread instead of worker threads (for scripts and tests).
    """

    _display_prefix = "stratagem-simlab"

    _esm = front_end_file("simulation_lab.js")
    _css = front_end_file("simulation_lab.css")

    groups = traitlets.List(traitlets.Dict(), default_value=[]).tag(sync=True)
    confounding = traitlets.Float(0.5).tag(sync=True)
    n = traitlets.Int(2000).tag(sync=True)
    seed = traitlets.Int(0).tag(sync=True)
    method = traitlets.Unicode("aipw").tag(sync=True)
    level = traitlets.Float(0.95).tag(sync=True)
    draws = traitlets.Int(100).tag(sync=True)
    repeating = traitlets.Bool(False).tag(sync=True)

    _draw = traitlets.Dict(default_value={}).tag(sync=True)
    _repeats = traitlets.Dict(default_value={}).tag(sync=True)
    _status = traitlets.Dict(default_value={"state": "idle", "message": ""}).tag(sync=True)
    _repeat_status = traitlets.Dict(
        default_value={"state": "idle", "message": "", "progress": 0.0, "done": 0, "draws": 0}
    ).tag(sync=True)
    _choices = traitlets.Dict(default_value={}).tag(sync=True)

    _SETUP_INPUTS = ("groups", "confounding", "n", "seed", "method", "level")

    def __init__(
        self,
        shares: Mapping | None = None,
        *,
        weights: Mapping | None = None,
        n: int = 2000,
        confounding: float = 0.5,
        method: str = "aipw",
        level: float = 0.95,
        seed: int = 0,
        draws: int = 100,
        modifier: str = "group",
        sync: bool = False,
    ):
        groups = _groups_from(shares if shares is not None else DEFAULT_SHARES, weights)
        self._modifier = modifier
        self._sync_mode = bool(sync)
        self._lock = threading.RLock()
        self._internal = False  # True while Python itself writes `repeating`
        self._result: LabDraw | None = None
        self._comparison: pd.DataFrame | None = None
        self._repeats_frame: pd.DataFrame | None = None
        self._display_id = None  # set when first displayed (SnapshotDisplay)
        self._snapshot: str | None = None
        self._last_progress = 0.0
        _check_draws(draws)
        setup = self._make_setup(groups, confounding, n, method, level)
        _check_seed(seed)
        super().__init__(
            groups=groups, confounding=float(setup.confounding), n=int(n), seed=int(seed), method=method,
            level=float(level), draws=int(draws),
            _choices={"methods": [[m, _METHOD_LABELS[m]] for m in ADJUSTED_METHODS], "levels": [0.8, 0.9, 0.95, 0.99],
                      "types": list(TYPES), "max_draws": MAX_DRAWS, "max_levels": MAX_LEVELS,
                      "min_n": MIN_N, "max_n": MAX_N, "modifier": modifier},
        )
        self._runner = Runner(self._deliver_draw, post=None)
        self._repeat_runner = Runner(self._deliver_repeats, post=None)
        self._runner.run_here(self._draw_job, (setup, int(seed)))
        self.observe(self._on_setup, names=list(self._SETUP_INPUTS))
        self.observe(self._on_repeating, names=["repeating"])
        self.observe(self._on_draws, names=["draws"])

    # -- public ------------------------------------------------------------------------------------
    @property
    def setup(self) -> LabSetup | None:
        """The :class:`~stratagem.simlab.LabSetup` of the draw on screen."""
        return None if self._result is None else self._result.setup

    @property
    def result(self) -> LabDraw | None:
        """The draw on screen: ``stratagem.simlab.draw(lab.setup, lab.seed)``."""
        return self._result

    @property
    def comparison(self) -> pd.DataFrame | None:
        """``stratagem.simlab.compare(lab.result)``: the one-draw table shown."""
        return self._comparison

    @property
    def repeats(self) -> pd.DataFrame | None:
        """The bias and coverage table shown (``repeat_draws(...)``), or None."""
        return self._repeats_frame

    def repeat(self, draws: int | None = None) -> None:
        """Start the repeated draws (as the Repeat button does); ``draws`` replaces the trait."""
        if draws is not None:
            self.draws = draws
        if self.repeating:
            self._start_repeats()  # already asked for: start again with the current settings
        else:
            self.repeating = True

    def stop(self) -> None:
        """Stop the repeated draws (their partial work is dropped)."""
        self.repeating = False

    def wait(self, timeout: float | None = 60.0) -> None:
        """Block until the newest draw and the newest repeated draws are published."""
        for runner in (self._runner, self._repeat_runner):
            if not runner.wait(timeout):
                raise TimeoutError(
                    f"The simulation lab did not finish within {timeout} s; wait longer "
                    "(e.g. wait(timeout=300)) or ask for fewer draws."
                )

    def close(self) -> None:
        """Stop the worker threads and close the widget."""
        for name in ("_runner", "_repeat_runner"):
            runner = getattr(self, name, None)
            if runner is not None:
                runner.close()
        super().close()

    # -- traits -> LabSetup --------------------------------------------------------------------------
    def _make_setup(self, groups, confounding, n, method, level) -> LabSetup:
        if not isinstance(groups, (list, tuple)) or not groups:
            raise SpecError("Add at least one level of the modifier.")
        if len(groups) > MAX_LEVELS:
            raise SpecError(f"The lab takes at most {MAX_LEVELS} levels; got {len(groups)}. Remove a level.")
        shares, weights = {}, {}
        for i, g in enumerate(groups):
            if not isinstance(g, Mapping):
                raise SpecError(f"Level {i + 1} must be a mapping with a name, a weight and four shares; got {g!r}.")
            name = str(g.get("level", "")).strip()
            if not name:
                raise SpecError(f"Level {i + 1} has no name; give it one, e.g. 'low'.")
            if name in shares:
                raise SpecError(f"Two levels are called {name!r}; give each level its own name.")
            shares[name] = {t: g.get(t) for t in TYPES}
            weights[name] = g.get("weight")
        if isinstance(n, bool) or not isinstance(n, int) or not MIN_N <= n <= MAX_N:
            raise SpecError(f"The sample size must be a whole number from {MIN_N} to {MAX_N:,}; got {n!r}.")
        return LabSetup(shares=shares, weights=weights, n=n, confounding=confounding, method=method,
                        level=level, modifier=self._modifier)

    def _setup_from_traits(self) -> LabSetup:
        return self._make_setup(list(self.groups), self.confounding, self.n, self.method, self.level)

    # -- one draw ----------------------------------------------------------------------------------
    def _on_setup(self, change) -> None:
        self._status = {"state": "running", "message": ""}
        self._clear_repeats("The settings changed: press Repeat to draw again with the new ones.")
        try:
            setup = self._setup_from_traits()
            _check_seed(self.seed)
        except StratagemError as exc:
            self._runner.run_here(_raise, exc)
            return
        if self._sync_mode:
            self._runner.run_here(self._draw_job, (setup, int(self.seed)))
        else:
            self._runner.submit(self._draw_job, (setup, int(self.seed)))

    def _draw_job(self, argument, check):
        setup, seed = argument
        check()
        result = draw(setup, seed)
        check()
        table = compare(result)
        return result, table, draw_payload(setup, seed, table)

    def _deliver_draw(self, outcome: Outcome) -> None:
        with self._lock:
            if outcome.error is not None:
                self._status = {"state": "error", "message": _friendly(outcome.error)}
            else:
                self._result, self._comparison, payload = outcome.value
                with self.hold_sync():
                    self._draw = payload
                    self._status = {"state": "idle", "message": ""}
            self._refresh_display()

    # -- repeated draws ------------------------------------------------------------------------------
    def _on_draws(self, change) -> None:
        try:
            _check_draws(self.draws)
        except StratagemError as exc:
            self._repeat_status = {**self._repeat_status, "state": "error", "message": str(exc)}

    def _on_repeating(self, change) -> None:
        if self._internal:
            return
        if change["new"]:
            self._start_repeats()
        else:
            self._clear_repeats("Stopped: press Repeat to start again.", keep=True, state="stopped")

    def _start_repeats(self) -> None:
        try:
            _check_draws(self.draws)
            setup = self._setup_from_traits()
            _check_seed(self.seed)
        except StratagemError as exc:
            self._set_repeating(False)
            self._repeat_status = {"state": "error", "message": str(exc), "progress": 0.0, "done": 0,
                                   "draws": int(self.draws) if isinstance(self.draws, int) else 0}
            return
        draws, seed = int(self.draws), int(self.seed)
        self._repeat_status = {"state": "running", "message": "", "progress": 0.0, "done": 0, "draws": draws}
        self._last_progress = 0.0
        if self._sync_mode:
            self._repeat_runner.run_here(self._repeat_job, (setup, draws, seed))
        else:
            self._repeat_runner.submit(self._repeat_job, (setup, draws, seed))

    def _repeat_job(self, argument, check):
        setup, draws, seed = argument

        def progress(fraction: float) -> None:
            check()  # a newer request (or Stop) raises here and abandons the remaining draws
            now = time.monotonic()
            if now - self._last_progress >= _PROGRESS_INTERVAL or fraction >= 1:
                self._last_progress = now
                self._post(lambda: self._progress(check, fraction, draws))

        check()
        frame = repeat_draws(setup, draws=draws, seed=seed, progress=progress)
        return frame, repeats_payload(setup, draws, seed, frame)

    def _post(self, fn) -> None:
        post = kernel_post()
        (fn if post is None else lambda: post(fn))()

    def _progress(self, check, fraction: float, draws: int) -> None:
        try:
            check()
        except Exception:
            return
        with self._lock:
            self._repeat_status = {"state": "running", "message": "", "progress": float(fraction),
                                   "done": int(round(fraction * draws)), "draws": draws}

    def _deliver_repeats(self, outcome: Outcome) -> None:
        with self._lock:
            if outcome.error is not None:
                self._set_repeating(False)
                self._repeat_status = {**self._repeat_status, "state": "error",
                                       "message": _friendly(outcome.error)}
            elif isinstance(outcome.value, tuple):
                frame, payload = outcome.value
                self._repeats_frame = frame
                with self.hold_sync():
                    self._repeats = payload
                    self._repeat_status = {"state": "done", "message": "", "progress": 1.0,
                                           "done": payload["draws"], "draws": payload["draws"]}
                    self._set_repeating(False)
            self._refresh_display()

    def _clear_repeats(self, message: str, keep: bool = False, state: str = "stale") -> None:
        """Drop the repeated draws (superseding a running one): the settings they used are gone."""
        running = self._repeat_status.get("state") == "running"
        if self._repeat_status.get("state") == "error" and not keep:
            self._repeat_status = {"state": "idle", "message": "", "progress": 0.0, "done": 0,
                                   "draws": int(self.draws)}
        if not running and not self._repeats and not keep:
            return
        self._repeat_runner.run_here(_cleared, message)  # supersedes the running job, if any
        with self._lock:
            with self.hold_sync():
                if not keep:
                    self._repeats = {}
                    self._repeats_frame = None
                if running or not keep:
                    self._repeat_status = {"state": state, "message": message, "progress": 0.0,
                                           "done": 0, "draws": int(self.draws)}
                self._set_repeating(False)

    def _set_repeating(self, value: bool) -> None:
        self._internal = True
        try:
            self.repeating = value
        finally:
            self._internal = False

    # -- display -------------------------------------------------------------------------------------
    def _snapshot_html(self) -> str:
        return snapshot_html(self._draw, self._repeats, self._status)


def _raise(exc, _check):
    raise exc


def _check_draws(draws) -> None:
    if isinstance(draws, bool) or not isinstance(draws, int) or not 1 <= draws <= MAX_DRAWS:
        raise SpecError(f"The number of draws must be a whole number from 1 to {MAX_DRAWS}; got {draws!r}.")


def _check_seed(seed) -> None:
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise SpecError(f"The random state must be a whole number of 0 or more; got {seed!r}.")


# -- payloads (JSON for the front end; numbers copied from the pure functions' tables) -------------
_CELL = ("estimate", "ci_low", "ci_high", "se", "status", "covered", "error")


def draw_payload(setup: LabSetup, seed: int, table: pd.DataFrame) -> dict:
    """The one-draw view as JSON: per stratum the truth, crude and adjusted rows of ``table``.

    ``table`` is :func:`stratagem.simlab.compare` of ``draw(setup, seed)``. Keys: ``rows`` (one per
    stratum then overall: ``stratum``, ``modifier_level``, ``n``, ``set_effect``, ``truth``, and
    ``crude`` / ``adjusted`` with ``estimate``, ``ci_low``, ``ci_high``, ``se``, ``status``,
    ``covered``, ``error``), ``axis`` (``domain`` and ``ticks`` of the plot, risk difference),
    ``method``, ``method_label``, ``level``, ``seed``, ``n``, ``code``, ``caution``.
    """
    rows = []
    for stratum in dict.fromkeys(table["stratum"]):
        part = table[table["stratum"] == stratum].set_index("role")
        truth = part.loc["truth"]
        row = {"stratum": str(stratum), "modifier_level": str(truth["modifier_level"]),
               "n": plain(truth["n"]), "set_effect": plain(truth["set_effect"]), "truth": plain(truth["estimate"])}
        for role in ("crude", "adjusted"):
            row[role] = {k: plain(part.loc[role, k]) for k in _CELL}
        rows.append(row)
    values = [0.0]
    for row in rows:
        values += [row["truth"], row["set_effect"]]
        for role in ("crude", "adjusted"):
            values += [row[role]["estimate"], row[role]["ci_low"], row[role]["ci_high"]]
    finite = [v for v in values if isinstance(v, (int, float)) and math.isfinite(v)]
    lo, hi = min(finite), max(finite)
    if hi - lo < 1e-9:
        lo, hi = lo - 0.1, hi + 0.1
    pad = 0.05 * (hi - lo)
    domain = [lo - pad, hi + pad]
    return {
        "rows": rows,
        "axis": {"domain": domain, "ticks": nice_ticks(*domain)},
        "modifier": setup.modifier,
        "method": setup.method,
        "method_label": _METHOD_LABELS[setup.method],
        "level": setup.level,
        "seed": int(seed),
        "n": setup.n,
        "confounding": setup.confounding,
        "code": setup.code(seed),
        "caution": CAUTION,
    }


def repeats_payload(setup: LabSetup, draws: int, seed: int, frame: pd.DataFrame) -> dict:
    """The repeated draws as JSON: ``rows`` (records of :func:`repeat_draws`), ``draws``, ``seed``,
    ``level`` (nominal coverage), ``method``, ``method_label``, ``code``."""
    return {
        "rows": records(frame),
        "draws": int(draws),
        "seed": int(seed),
        "level": setup.level,
        "method": setup.method,
        "method_label": _METHOD_LABELS[setup.method],
        "code": setup.repeat_code(draws, seed),
    }


def _f(value, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "—"
    return f"{value:.{digits}f}"


def _interval(cell: dict) -> str:
    return f"{_f(cell['estimate'])} ({_f(cell['ci_low'])} to {_f(cell['ci_high'])})"


def snapshot_html(draw: dict, repeats: dict, status: dict | None = None) -> str:
    """Static HTML of the lab (for notebooks rendered without a kernel): both tables, escaped."""
    e = html.escape
    if not draw:
        return f"<p>Simulation lab: {e((status or {}).get('message') or 'no draw yet')}</p>"
    cell = 'style="padding:0 6px;text-align:right"'
    head = 'style="padding:0 6px;text-align:left;border-bottom:1px solid #ccc"'
    lines = [
        "<div>",
        f"<p><strong>Simulation lab — one draw (n = {draw['n']:,}, confounding {draw['confounding']:.2f}, "
        f"random state {draw['seed']})</strong></p>",
        "<table><thead><tr>" + "".join(
            f"<th {head}>{e(h)}</th>" for h in ("stratum", "n", "set", "true", "crude",
                                                 e(draw['method_label']))) + "</tr></thead><tbody>",
    ]
    for row in draw["rows"]:
        lines.append(
            f"<tr><td style=\"padding:0 6px\">{e(row['stratum'])}</td><td {cell}>{_f(row['n'], 0)}</td>"
            f"<td {cell}>{_f(row['set_effect'])}</td><td {cell}>{_f(row['truth'])}</td>"
            f"<td {cell}>{_interval(row['crude'])}</td><td {cell}>{_interval(row['adjusted'])}</td></tr>"
        )
    lines.append("</tbody></table>")
    if repeats:
        lines.append(f"<p><strong>{repeats['draws']} draws: bias and coverage of "
                     f"{repeats['level']:.0%} intervals</strong></p>")
        lines.append("<table><thead><tr>" + "".join(
            f"<th {head}>{h}</th>" for h in ("method", "stratum", "bias", "coverage", "RMSE", "draws"))
            + "</tr></thead><tbody>")
        for r in repeats["rows"]:
            lines.append(
                f"<tr><td style=\"padding:0 6px\">{e(str(r['method']))}</td>"
                f"<td style=\"padding:0 6px\">{e(str(r['stratum']))}</td>"
                f"<td {cell}>{_f(r['bias'])}</td><td {cell}>{_f(r['coverage'], 2)}</td>"
                f"<td {cell}>{_f(r['rmse'])}</td><td {cell}>{r['draws']}</td></tr>"
            )
        lines.append("</tbody></table>")
    lines.append(f"<p><em>{e(draw['caution'])}</em></p></div>")
    return "\n".join(lines)

