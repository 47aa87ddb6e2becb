"""Progress bars: drawn on standard error, and only when it is a terminal.

One policy for every long step: ``progress=None`` shows a bar when standard
error is a terminal, ``True`` always, ``False`` never. Bars never write to
standard output, so JSON piped from the command line stays clean. Built on
``tqdm``.

Examples
--------
>>> with progress_bar(3, "pairs", enabled=False) as bar:
...     for _ in range(3):
...         bar.update(1)
>>> bar.n
3
"""

from __future__ import annotations

import sys

from tqdm.auto import tqdm

__all__ = ["progress_bar", "bar_enabled"]


def bar_enabled(progress: bool | None) -> bool:
    """Whether a bar is drawn for the ``progress`` option (None: on a terminal only)."""
    if progress is None:
        return bool(getattr(sys.stderr, "isatty", lambda: False)())
    return bool(progress)


class _Bar:
    """A step counter that draws through ``tqdm`` only when enabled (``n`` counts either way)."""

    def __init__(self, total: int, label: str, enabled: bool) -> None:
        self.total = max(int(total), 0)
        self.n = 0
        self._bar = (tqdm(total=self.total, desc=label, file=sys.stderr, leave=False, dynamic_ncols=True,
                          mininterval=0.2) if enabled and self.total else None)

    def update(self, steps: int = 1) -> None:
        self.n += steps
        if self._bar is not None:
            self._bar.update(steps)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self) -> _Bar:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def progress_bar(total: int, label: str, *, enabled: bool | None = None) -> _Bar:
    """A bar of ``total`` steps labelled ``label`` on standard error, drawn per the ``progress`` policy.

    ``enabled`` is the ``progress`` option (None: on a terminal only). The
    bar counts when not drawn (``bar.n``), so callers need not branch.
    """
    return _Bar(total, label, bar_enabled(enabled))
