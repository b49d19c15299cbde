"""Progress bars for long computations (a thin wrapper over tqdm).

Bars are shown only when stderr is a terminal, so logs and CI output stay clean.  The
environment variable ``LARGEQ_PROGRESS`` overrides that: ``1`` forces bars on, ``0``
forces them off.  An explicit ``enabled=True/False`` argument overrides both.
"""

from __future__ import annotations

import os
import sys
from typing import Any, Mapping, TextIO

__all__ = ["ENV_VAR", "progress_enabled", "progress_bar", "ProgressBar"]

ENV_VAR = "LARGEQ_PROGRESS"


def progress_enabled(enabled: bool | None = None, stream: TextIO | None = None) -> bool:
    """Decide whether to draw a progress bar.

    Parameters
    ----------
    enabled : bool or None
        Explicit choice; None means automatic.
    stream : file-like, optional
        Where the bar goes (default ``sys.stderr``).

    Returns
    -------
    bool
        ``enabled`` if given; else ``LARGEQ_PROGRESS`` (``1``/``true``/``yes``/``on`` or
        ``0``/``false``/``no``/``off``) if set; else whether ``stream`` is a terminal.
    """
    if enabled is not None:
        return bool(enabled)
    env = os.environ.get(ENV_VAR, "").strip().lower()
    if env in ("1", "true", "yes", "on"):
        return True
    if env in ("0", "false", "no", "off"):
        return False
    stream = sys.stderr if stream is None else stream
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):  # closed or not a real stream
        return False


class ProgressBar:
    """A progress bar with ETA, or a silent stand-in when disabled.

    Use :func:`progress_bar` to make one.  Works as a context manager.
    """

    def __init__(
        self, total: float | None, desc: str, *, enabled: bool, stream: TextIO | None = None
    ) -> None:
        self.enabled = enabled
        self.total = total
        self.n = 0
        self._bar = None
        if enabled:
            from tqdm import tqdm

            self._bar = tqdm(
                total=total,
                desc=desc,
                file=sys.stderr if stream is None else stream,
                dynamic_ncols=True,
                leave=True,
                smoothing=0.1,
            )

    def update(self, n: float = 1) -> None:
        """Advance by ``n`` units."""
        self.n += n
        if self._bar is not None:
            self._bar.update(n)

    def set_postfix(self, values: Mapping[str, Any] | None = None, **kw: Any) -> None:
        """Show extra numbers after the bar (e.g. ``{"t": 12.5, "err": 1e-9}``)."""
        if self._bar is not None:
            merged = dict(values or {}, **kw)
            self._bar.set_postfix(
                {k: (f"{v:.4g}" if isinstance(v, float) else v) for k, v in merged.items()},
                refresh=False,
            )

    def close(self) -> None:
        """Finish the bar (safe to call twice)."""
        if self._bar is not None:
            self._bar.close()
            self._bar = None

    def __enter__(self) -> "ProgressBar":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def progress_bar(
    total: float | None,
    desc: str = "",
    *,
    enabled: bool | None = None,
    stream: TextIO | None = None,
) -> ProgressBar:
    """Make a progress bar.

    Parameters
    ----------
    total : float or None
        Number of units of work (None: unknown, no ETA).
    desc : str
        Short label shown before the bar.
    enabled : bool or None
        Force on/off; None decides by :func:`progress_enabled`.
    stream : file-like, optional
        Output stream (default ``sys.stderr``).

    Returns
    -------
    ProgressBar
        Object with ``update(n)``, ``set_postfix(dict)``, ``close()``; a context manager.
    """
    return ProgressBar(
        total, desc, enabled=progress_enabled(enabled, stream), stream=stream
    )
