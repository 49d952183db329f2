"""The Explorer: an anywidget whose state is a Spec and whose view is the Analysis of that Spec.

Traits, in three kinds (see DESIGN.md and the widget contract):

* public inputs the front end writes: ``strata``, ``bins``, ``method``, ``measure``, ``level``,
  ``interval``, ``n_boot``; and ``view``, the open view (no recompute);
* derived state Python writes (leading underscore): ``_variables``, ``_result``, ``_status``,
  ``_transport`` (the effect in a target population, when one is picked);
* Python-only: :attr:`Explorer.analysis`, :attr:`Explorer.spec`, :attr:`Explorer.target` and
  :attr:`Explorer.transported`.

Every change of an input builds a new Spec and calls :func:`stratagem.analyze` on a worker thread;
the newest request supersedes running ones (their results are dropped); the result is published as
JSON (:func:`~.payload.analysis_payload`), and right after that message a static HTML snapshot
replaces the ``text/html`` of every displayed copy of the widget (through its display id). When a target
population is picked (``target=`` or :meth:`Explorer.set_target`), each new Analysis is also passed
to :func:`stratagem.transport`, and the effect in the target is shown beside the overall effect.
Nothing shown is computed anywhere but in ``analyze`` and ``transport``.

A choice seen before (the same Spec on a table whose columns still hash the same) reuses its
Analysis instead of computing it again: ``analyze`` is a pure function of the table and the Spec, so
the numbers are the same; a table changed in place is analysed again. Each computation reads a
shallow copy of the table (under pandas' copy-on-write, later edits of the table do not reach it),
and the digest of a new choice is taken from that copy after its result is published, so hashing
the columns does not delay the first view of a choice.
"""

from __future__ import annotations

import hashlib
import pathlib
import threading
import time
from collections import OrderedDict
from collections.abc import Mapping, Sequence
from typing import Any

import anywidget
import numpy as np
import pandas as pd
import traitlets

from ..analysis import analyze
from ..errors import ColumnNotFoundError, DataError, SpecError, StratagemError
from ..frame import modifier_summary
from ..results import Analysis
from ..spec import Spec
from .display import SnapshotDisplay
from .payload import Target, analysis_payload, run_transport
from .snapshot import placeholder_html, snapshot_html
from .worker import Outcome, Runner, Superseded, kernel_post

__all__ = ["Explorer", "front_end_file"]


def _raise(exc, _check):
    raise exc


def _check_target(data, name: str = "target", weights=None, sampled: bool = True) -> Target | None:
    """Check the arguments naming a target population; None when there is none."""
    if data is None:
        return None
    if not isinstance(data, (pd.DataFrame, Mapping)):
        raise DataError(
            f"The target must be a pandas DataFrame of the target population or a mapping of "
            f"stratum to share; got {type(data).__name__}. Pass one of those, or None to remove it."
        )
    if not isinstance(name, str) or not name.strip():
        raise SpecError(f"The target's name must be a non-empty string, e.g. 'clinic B'; got {name!r}.")
    if not isinstance(sampled, bool):
        raise SpecError(f"The 'sampled' parameter must be True or False; got {sampled!r}.")
    return Target(data, name, weights, sampled)


_PACKAGE = pathlib.Path(__file__).resolve().parent.parent


def front_end_file(name: str) -> pathlib.Path:
    """``stratagem/static/<name>`` of an installed wheel, else the repository's ``js/<name>``."""
    shipped = _PACKAGE / "static" / name
    if shipped.exists():
        return shipped
    repo = _PACKAGE.parent.parent / "js" / name
    if repo.exists():
        return repo
    raise FileNotFoundError(
        f"The Explorer's front-end file {name!r} is missing from {shipped} and {repo}; "
        "reinstall stratagem."
    )


# Spec fields the widget does not edit but passes through from the constructor.
_FIXED = ("confounders", "seed", "potential_outcomes", "counts", "exposed_level", "missing",
          "max_levels", "correction", "truncate", "monotone")

_CACHE_CELLS = 2_000_000  # results kept for revisited choices: at most this many rows x entries ...
_CACHE_MAX = 12  # ... and at most this many entries
_PROGRESS_STEP = 0.02  # publish bootstrap progress in steps of 2% at most
_PROGRESS_INTERVAL = 0.1  # ... and at most every 0.1 s


def _fingerprint(data: pd.DataFrame, spec: Spec) -> bytes | None:
    """A digest of the columns ``spec`` reads (values, order, dtypes), or None if unhashable.

    Results are reused only when the table's columns still hash the same, so a table changed in
    place is analysed again. Row order counts (the bootstrap draws rows by position).

    Each column is hashed on its own (``pandas.util.hash_pandas_object``, no copy of the columns)
    and the per-row hashes are folded column by column with a multiply-add in 64-bit wrapping
    arithmetic, which keeps their order; one digest of the folded array follows.
    """
    names = [spec.exposure, spec.outcome, *spec.confounders, *spec.strata, spec.counts,
             *(spec.potential_outcomes or ())]
    cols = [c for c in dict.fromkeys(names) if c is not None and c in data.columns]
    folded = np.zeros(len(data), dtype=np.uint64)
    dtypes = []
    try:
        for c in cols:
            column = data[c]
            hashed = pd.util.hash_pandas_object(column, index=False).to_numpy()
            if hashed.ndim != 1 or hashed.dtype != np.uint64:  # e.g. a repeated column name
                return None
            folded *= _FOLD
            folded += hashed
            dtypes.append(str(column.dtype))
    except Exception:  # e.g. unhashable objects in a column: no reuse, always recompute
        return None
    digest = hashlib.blake2b(memoryview(folded).cast("B"), digest_size=16)
    digest.update(repr((len(data), cols, dtypes)).encode())
    return digest.digest()


_FOLD = np.uint64(0x9E3779B97F4A7C15)  # odd multiplier (2^64 / golden ratio) folding column hashes


def _friendly(exc: BaseException) -> str:
    """The message shown in the widget for an exception raised by ``analyze``."""
    if isinstance(exc, StratagemError):
        return str(exc)
    if isinstance(exc, ModuleNotFoundError) and str(exc.name or "").startswith("stratagem.estimate."):
        method = str(exc.name).rsplit(".", 1)[-1].replace("_", "-")
        return f"The {method!r} method is not available in this version of stratagem; choose another method."
    return f"The analysis failed ({type(exc).__name__}: {exc}). Change a choice or report this as a bug."


class Explorer(SnapshotDisplay, anywidget.AnyWidget):
    """Explore effect modification interactively: drag modifiers into "Stratify by", read effects.

    Parameters
    ----------
    data : pandas.DataFrame
        The table; only read (never changed).
    exposure, outcome : str
        Column names (see :class:`~stratagem.spec.Spec`).
    confounders : sequence of str
        Columns adjusted for.
    strata : sequence of str
        Initial modifiers, in nesting order.
    method, measure : str or None
        As in :func:`stratagem.analyze`; None lets stratagem choose.
    level : float
        Confidence level in (0, 1).
    interval : {"wald", "bootstrap"}
    n_boot : int
        Bootstrap replicates.
    bins : mapping of str to int
        Quantile bins per numeric modifier.
    variables : sequence of str or None
        Columns offered as modifiers; None offers every column except the exposure, outcome,
        counts and potential-outcome columns.
    data_name : str
        The name the Code view uses for the table (default ``"df"``).
    target : pandas.DataFrame or mapping, optional
        A target population (see :meth:`set_target`): the Effects view then shows the overall effect
        transported to it, beside the study's overall effect.
    target_name : str
        What the view calls the target (default ``"target"``).
    sync : bool
        Compute on the calling thread instead of a worker thread (for scripts and tests).
    **fixed
        Other Spec fields passed through unchanged: ``seed``, ``potential_outcomes``, ``counts``,
        ``exposed_level``, ``missing``, ``max_levels``, ``correction``, ``truncate``, ``monotone``.

    Attributes
    ----------
    analysis : Analysis or None
        The Analysis on screen (the newest successful one).
    spec : Spec
        Its Spec (resolved: method and measure filled in).
    target : Target or None
        The picked target population (Python-only, never synced).
    transported : TransportResult or None
        ``transport(analysis, target)`` of the Analysis on screen, when it succeeded.
    """

    _display_prefix = "stratagem-explorer"

    _esm = front_end_file("explorer.js")
    _css = front_end_file("explorer.css")

    strata = traitlets.List(traitlets.Unicode(), default_value=[]).tag(sync=True)
    bins = traitlets.Dict(default_value={}).tag(sync=True)
    method = traitlets.Unicode(None, allow_none=True).tag(sync=True)
    measure = traitlets.Unicode(None, allow_none=True).tag(sync=True)
    level = traitlets.Float(0.95).tag(sync=True)
    interval = traitlets.Unicode("wald").tag(sync=True)
    n_boot = traitlets.Int(1000).tag(sync=True)

    # The open view (written by the front end; Python may set it): kept in a trait so a view that
    # JupyterLab re-creates after a snapshot refresh opens where the user was. Not an analysis input.
    view = traitlets.Enum(("effects", "types", "checks", "code"), default_value="effects").tag(sync=True)

    _variables = traitlets.List(default_value=[]).tag(sync=True)
    _result = traitlets.Dict(default_value={}).tag(sync=True)
    _status = traitlets.Dict(default_value={"state": "idle", "message": "", "progress": 0.0}).tag(sync=True)
    _transport = traitlets.Dict(default_value={}).tag(sync=True)

    _INPUTS = ("strata", "bins", "method", "measure", "level", "interval", "n_boot")

    def __init__(
        self,
        data: pd.DataFrame,
        *,
        exposure: str,
        outcome: str,
        confounders: Sequence[str] = (),
        strata: Sequence[str] = (),
        method: str | None = None,
        measure: str | None = None,
        level: float = 0.95,
        interval: str = "wald",
        n_boot: int = 1000,
        bins: dict | None = None,
        variables: Sequence[str] | None = None,
        data_name: str = "df",
        target: pd.DataFrame | Mapping | None = None,
        target_name: str = "target",
        sync: bool = False,
        **fixed: Any,
    ):
        from ..engines import is_engine_input, source_for

        in_engine = not isinstance(data, pd.DataFrame) and is_engine_input(data)
        if not isinstance(data, pd.DataFrame) and not in_engine:
            from ..dataframes import to_pandas_input

            # polars, pyarrow, ...: converted once here (a lazy frame is collected); anything else
            # raises DataError listing the accepted tables
            data = to_pandas_input(data)
        # a table in an engine: its columns from the schema; chips summarised by engine queries
        self._engine = source_for(data) if in_engine else None
        columns = pd.Index(self._engine.columns) if in_engine else data.columns
        unknown = sorted(set(fixed) - set(_FIXED))
        if unknown:
            raise SpecError(
                f"Unknown Explorer argument(s) {unknown}. Valid: exposure, outcome, strata, method, "
                f"measure, level, interval, n_boot, bins, variables, data_name, target, target_name, "
                f"sync, {', '.join(_FIXED)}."
            )
        if not data_name.isidentifier():
            raise SpecError(f"data_name must be a Python identifier, e.g. 'df'; got {data_name!r}.")
        self._data = data
        self._data_name = data_name
        self._fixed = {"confounders": tuple(confounders), **fixed}
        self._base = Spec.from_fields(
            exposure=exposure, outcome=outcome, strata=tuple(strata), method=method, measure=measure,
            level=level, interval=interval, n_boot=n_boot, bins=dict(bins or {}), **self._fixed,
        )  # validates every field now, so a mistake raises here with the usual message
        missing = [c for c in (exposure, outcome, *confounders, *strata) if c not in columns]
        if missing:
            raise ColumnNotFoundError(
                f"Column {missing[0]!r} is not in the data. Columns are: "
                f"{[str(c) for c in columns[:12]]}. Pass one of these names."
            )
        self._sync_mode = sync
        self._lock = threading.RLock()
        self._analysis: Analysis | None = None
        self._requested: Spec | None = None
        self._display_id = None  # set when first displayed (SnapshotDisplay)
        self._last_progress = (0.0, 0.0)
        self._target = _check_target(target, target_name)
        self._transported = None
        self._cache: OrderedDict = OrderedDict()  # (spec JSON, data digest) -> [analysis, payload, target, moved]
        self._cache_lock = threading.Lock()
        # no reuse for engine tables: their content cannot be hashed without reading every row
        self._cache_size = 0 if in_engine else min(_CACHE_MAX, _CACHE_CELLS // max(len(data), 1))
        super().__init__(
            strata=list(strata), bins=dict(bins or {}), method=method, measure=measure,
            level=float(level), interval=interval, n_boot=int(n_boot),
        )
        self._variables = self._describe_variables(variables)
        self._runner = Runner(self._deliver, post=None)
        # The first result is computed before the constructor returns, so the first display already
        # carries the table and its snapshot.
        self._compute_now()
        self.observe(self._on_input, names=list(self._INPUTS))

    # -- public ------------------------------------------------------------------------------------
    @property
    def analysis(self) -> Analysis | None:
        """The Analysis on screen (newest successful result), or None before the first one."""
        return self._analysis

    @property
    def spec(self) -> Spec:
        """The Spec of the Analysis on screen (resolved), or the requested Spec before any result."""
        if self._analysis is not None:
            return self._analysis.spec
        return self._requested if self._requested is not None else self._base

    @property
    def target(self) -> Target | None:
        """The picked target population (data, name, weights, sampled), or None."""
        return self._target

    @property
    def transported(self):
        """The TransportResult shown (``transport(explorer.analysis, target)``), or None."""
        return self._transported

    def set_target(
        self,
        target: pd.DataFrame | Mapping | None,
        *,
        name: str = "target",
        weights=None,
        sampled: bool = True,
    ) -> None:
        """Pick the population to transport the effect to; None removes it.

        The Effects view then shows ``stratagem.transport(explorer.analysis, target, weights=...,
        sampled=...)`` beside the study's overall effect, recomputed for every new Analysis. When
        transport refuses (a target stratum the study could not estimate, a missing modifier column,
        no modifier yet), its message shows in that place and the rest of the view stays.

        Parameters
        ----------
        target : pandas.DataFrame, mapping or None
            A table of the target population holding the modifier columns, or a mapping of stratum
            to share (see :func:`stratagem.transport`). Only read, never changed.
        name : str
            What the view calls the target, e.g. ``"clinic B"``.
        weights : str or array-like, optional
            Frequencies of the target table's rows (a column name or one number per row).
        sampled : bool
            Whether the target table is a sample (its shares then carry sampling variance).
        """
        record = _check_target(target, name, weights, sampled)
        with self._lock:
            self._target = record
            if self._analysis is not None:
                self._publish_transport(run_transport(self._analysis, record))
            self._refresh_display()

    @property
    def data(self) -> pd.DataFrame:
        """The table the Explorer reads (never changed by it)."""
        return self._data

    def wait(self, timeout: float | None = 30.0) -> Analysis | None:
        """Block until the newest request has been computed and published; return the Analysis.

        Raises TimeoutError after ``timeout`` seconds. When the newest request failed, the error is
        in ``_status`` and the previous Analysis is returned.
        """
        if not self._runner.wait(timeout):
            raise TimeoutError(
                f"The Explorer's computation did not finish within {timeout} s; wait longer "
                "(e.g. wait(timeout=120)) or use fewer bootstrap replicates."
            )
        return self._analysis

    def close(self) -> None:
        """Stop the worker thread and close the widget."""
        runner = getattr(self, "_runner", None)  # absent when the constructor refused its arguments
        if runner is not None:
            runner.close()
        super().close()

    # -- inputs -> Spec --------------------------------------------------------------------------
    def _spec_from_traits(self) -> Spec:
        strata = tuple(self.strata)
        bins = {k: v for k, v in dict(self.bins).items() if k in strata}
        return Spec.from_fields(
            exposure=self._base.exposure, outcome=self._base.outcome, strata=strata,
            method=self.method or None, measure=self.measure or None, level=float(self.level),
            interval=self.interval, n_boot=int(self.n_boot), bins=bins, **self._fixed,
        )

    def _describe_variables(self, variables: Sequence[str] | None) -> list[dict]:
        base = self._base
        taken = {base.exposure, base.outcome, base.counts, *(base.potential_outcomes or ())}
        columns = self._engine.columns if self._engine is not None else self._data.columns
        if variables is None:
            names = [c for c in columns if isinstance(c, str) and c not in taken]
        else:
            names = list(variables)
            bad = [c for c in names if c not in columns]
            if bad:
                raise ColumnNotFoundError(
                    f"variables names {bad[0]!r}, which is not in the data; pass column names."
                )
        out = []
        if self._engine is not None:  # one engine query counts the values of every column
            from ..engines import modifier_summaries

            summaries = modifier_summaries(self._engine, names, max_levels=base.max_levels)
        for name in names:
            info = (summaries[name] if self._engine is not None
                    else modifier_summary(self._data, name, max_levels=base.max_levels))
            out.append({"name": name, "tag": info["tag"], "ok": bool(info["ok"]),
                        "reason": info["reason"], "kind": info["kind"]})
        return out

    def _on_input(self, change) -> None:
        self._request()

    def _request(self) -> None:
        """Build the Spec from the traits and start computing it (superseding older requests)."""
        self._set_status("running", "", 0.0)
        try:
            spec = self._spec_from_traits()
        except StratagemError as exc:
            self._runner.run_here(_raise, exc)  # a bad choice is an error outcome like any other
            return
        self._requested = spec
        if self._sync_mode:
            self._runner.run_here(self._job, spec)
        else:
            self._runner.submit(self._job, spec)

    def _compute_now(self) -> None:
        """First result, computed on this thread through the same delivery path."""
        self._requested = self._base
        self._runner.run_here(self._job, self._base)

    # -- the job (worker thread) ---------------------------------------------------------------------
    def _job(self, spec: Spec, check) -> tuple:
        check()
        self._last_progress = (0.0, time.monotonic())

        def progress(fraction: float) -> None:
            check()  # raises Superseded when a newer request came in: stops the bootstrap early
            last, when = self._last_progress
            now = time.monotonic()
            if fraction - last >= _PROGRESS_STEP and now - when >= _PROGRESS_INTERVAL:
                self._last_progress = (fraction, now)
                self._post(lambda: self._progress(check, fraction))

        # A shallow copy: under pandas' copy-on-write an edit of the user's table after this point
        # does not reach it, so the analysis and the digest it is kept under see the same values.
        data = self._data.copy(deep=False) if isinstance(self._data, pd.DataFrame) else self._data
        wanted = spec.to_json() if self._cache_size >= 2 else None
        # The digest reads every used column (ms at 1e5 rows): computed before the analysis only
        # when a result for this choice is kept (it may be reused); otherwise after publishing.
        digest = _fingerprint(data, spec) if self._kept(wanted) else None
        entry = self._recall((wanted, digest))
        store = None
        if entry is None:
            analysis = analyze(data, spec, progress=progress)
            check()
            entry = [analysis, analysis_payload(analysis, self._data_name), None, None]
            if wanted is not None:
                store = self._storer(data, spec, wanted, digest, entry)
        analysis, payload = entry[0], entry[1]
        target = self._target
        if entry[2] is not target or entry[3] is None:
            entry[2], entry[3] = target, run_transport(analysis, target)
        moved = entry[3]
        try:
            check()
        except Superseded:  # not shown, but kept for when the user comes back to this choice
            if store is not None:
                store()
            raise
        return analysis, payload, moved, target, store

    def _storer(self, data: pd.DataFrame, spec: Spec, wanted: str, digest: bytes | None, entry: list):
        """A callable keeping ``entry`` under (``wanted``, the digest of ``data``), and under the
        resolved Spec too when it differs from ``spec``."""

        def store() -> None:
            key = (wanted, digest if digest is not None else _fingerprint(data, spec))
            self._remember(key, entry)
            if entry[0].spec != spec:
                self._remember((entry[0].spec.to_json(), key[1]), entry)

        return store

    # -- results of revisited choices ----------------------------------------------------------------
    def _kept(self, spec_json: str | None) -> bool:
        """Whether a result for this Spec (on any version of the table) is kept."""
        if spec_json is None:
            return False
        with self._cache_lock:
            return any(key[0] == spec_json for key in self._cache)

    def _recall(self, key) -> list | None:
        """The cached [analysis, payload, target, transport] for ``key``, or None."""
        if key is None or key[1] is None:
            return None
        with self._cache_lock:
            entry = self._cache.get(key)
            if entry is not None:
                self._cache.move_to_end(key)
            return entry

    def _remember(self, key, entry: list) -> None:
        if key is None or key[1] is None:
            return
        with self._cache_lock:
            self._cache[key] = entry
            while len(self._cache) > self._cache_size:
                self._cache.popitem(last=False)

    def _post(self, fn) -> None:
        post = kernel_post()
        if post is None:
            fn()
        else:
            post(fn)

    def _progress(self, check, fraction: float) -> None:
        try:
            check()
        except Exception:
            return
        with self._lock:
            self._set_status("running", "", fraction)

    # -- publishing (main loop) --------------------------------------------------------------------
    def _deliver(self, outcome: Outcome) -> None:
        with self._lock:
            if outcome.error is not None:
                self._set_status("error", _friendly(outcome.error), 0.0)
                self._refresh_display()
                return
            analysis, payload, moved, target, store = outcome.value
            if target is not self._target:  # set_target() was called while this was computed
                moved = run_transport(analysis, self._target)
            self._analysis = analysis
            with self.hold_sync():
                self._result = payload
                self._transported, self._transport = moved
                self._status = {"state": "idle", "message": "", "progress": 1.0}
            # after the result message: the static snapshot, then keeping the result for reuse
            self._snapshot = snapshot_html(payload, moved[1])
            self._refresh_display()
            if store is not None:
                store()

    def _publish_transport(self, moved: tuple) -> None:
        """Show a new target's transported effect for the Analysis on screen (no re-analysis)."""
        self._snapshot = snapshot_html(self._result, moved[1])
        self._transported, self._transport = moved

    def _set_status(self, state: str, message: str, progress: float) -> None:
        self._status = {"state": state, "message": message, "progress": float(progress)}

    # -- display -------------------------------------------------------------------------------
    _snapshot: str | None = None

    def _snapshot_html(self) -> str:
        if self._snapshot is not None:
            html = self._snapshot
            if self._status.get("state") == "error":
                from html import escape

                html = (f'<p style="color:#D55E00">{escape(self._status.get("message", ""))} '
                        "(the result below is the last one that succeeded)</p>" + html)
            return html
        message = self._status.get("message") or "no result yet"
        return placeholder_html(message)
