"""Progress bars (tqdm) for the long Python calls: Monte Carlo, comparisons, fold stability.

A bar is shown when the call's ``progress`` keyword says so; when it is ``None`` (the default)
the module-wide default set by :func:`set_progress` decides, and when that is ``None`` too a
bar is shown exactly when stderr is a terminal or the code runs in a Jupyter notebook. So
scripts whose stderr goes to a file, and the test suite, print nothing.
"""

from __future__ import annotations

import sys
from typing import Any

from ._errors import InputError

__all__ = ["set_progress", "progress_enabled"]

_default: bool | None = None


def set_progress(enabled: bool | None) -> None:
    """Switch the progress bars of the long calls on or off for the whole session.

    Parameters
    ----------
    enabled : bool or None
        ``False`` silences every bar (:func:`~orthoccp.run_montecarlo`,
        :func:`~orthoccp.compare`, :func:`~orthoccp.fold_stability`), ``True`` shows them
        even when stderr is not a terminal, ``None`` restores the default (shown on a
        terminal or in a notebook). A call's own ``progress=`` keyword takes precedence.

    Examples
    --------
    >>> import orthoccp as oc
    >>> oc.set_progress(False)  # no bars from here on
    >>> oc.set_progress(None)   # back to the default
    """
    global _default
    if enabled is not None and not isinstance(enabled, bool):
        raise InputError(
            f"set_progress takes True, False or None, got {enabled!r}; e.g. "
            f"orthoccp.set_progress(False) to silence the progress bars."
        )
    _default = enabled


def _in_notebook() -> bool:
    shell = getattr(sys.modules.get("IPython"), "get_ipython", lambda: None)()
    return type(shell).__name__ == "ZMQInteractiveShell"


def progress_enabled(progress: bool | None = None) -> bool:
    """Whether a bar is shown: the call's ``progress``, else the session default, else a
    terminal or a notebook."""
    if progress is not None:
        return bool(progress)
    if _default is not None:
        return _default
    isatty = getattr(sys.stderr, "isatty", None)
    return (bool(isatty()) if callable(isatty) else False) or _in_notebook()


def progress_bar(total: int, *, desc: str, unit: str, progress: bool | None) -> Any:
    """A tqdm bar on stderr (the notebook widget in Jupyter when available); disabled when
    :func:`progress_enabled` says no, so that ``update`` and ``close`` always work."""
    from tqdm import tqdm

    if not progress_enabled(progress):
        return tqdm(total=total, disable=True)
    bar_class: Any = tqdm
    if _in_notebook():
        try:
            import ipywidgets  # noqa: F401
            from tqdm.notebook import tqdm as bar_class
        except ImportError:
            pass
    return bar_class(total=total, desc=desc, unit=unit, file=sys.stderr, leave=False,
                     dynamic_ncols=True)
