"""Display plumbing shared by stratagem's widgets: a live view plus a static ``text/html`` snapshot.

A notebook renderer without a kernel or widget support shows the snapshot instead of the live view.
The output is displayed under a display id, so each new result can replace the snapshot in place and a
saved notebook holds the view the user last saw.
"""

from __future__ import annotations

__all__ = ["SnapshotDisplay"]


class SnapshotDisplay:
    """Mixin for an ``anywidget.AnyWidget`` subclass that defines ``_snapshot_html()``.

    The subclass sets ``_display_prefix`` (a short name used in the display id) and calls
    :meth:`_refresh_display` after every new result.
    """

    _display_prefix = "stratagem-widget"
    _display_id: str | None = None

    def _snapshot_html(self) -> str:  # pragma: no cover - every widget defines it
        raise NotImplementedError

    def _repr_mimebundle_(self, **kwargs):
        bundle = super()._repr_mimebundle_(**kwargs)
        data, meta = bundle if isinstance(bundle, tuple) else (bundle, {})
        data = dict(data or {})
        data["text/html"] = self._snapshot_html()
        return (data, meta) if isinstance(bundle, tuple) else data

    def _bundle(self):
        bundle = self._repr_mimebundle_()
        return bundle if isinstance(bundle, tuple) else (bundle, {})

    def _ipython_display_(self, **kwargs) -> None:
        from IPython.display import display

        if self._display_id is None:
            self._display_id = f"{self._display_prefix}-{self.model_id}"
        data, meta = self._bundle()
        display(data, metadata=meta, raw=True, display_id=self._display_id)

    def _refresh_display(self) -> None:
        """Replace the ``text/html`` snapshot of every displayed copy (keeps saved notebooks current)."""
        if self._display_id is None:
            return
        from IPython.display import update_display

        data, meta = self._bundle()
        update_display(data, metadata=meta, raw=True, display_id=self._display_id)
