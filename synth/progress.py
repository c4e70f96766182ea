"""Progress of a search on stderr.

On a terminal: one live line (rich), redrawn in place, with the phase, evaluations,
feasible count, best objective values, hypervolume (when the search reports one),
elapsed time and the limits. Otherwise (a pipe, a log file): one plain line per
phase, written when the phase ends, with no carriage returns, so a log stays
readable line by line.
"""

from __future__ import annotations

import sys
import time


def _num(x) -> str:
    try:
        return f"{float(x):.4g}"
    except (TypeError, ValueError):
        return str(x)


def describe(p, budget: int | None = None, time_limit_s: float | None = None) -> str:
    """One progress record in words (no colour, no control characters)."""
    parts = [f"[{p.phase}]", f"{p.evaluated}" + (f"/{budget}" if budget else "") + " evaluated",
             f"{p.feasible} feasible"]
    hv = getattr(p, "hypervolume", None)
    if hv is not None:
        parts.append(f"hypervolume {_num(hv)}")
    if p.best:
        parts.append("best " + ", ".join(f"{k}={_num(v)}" for k, v in p.best.items()))
    parts.append(f"{p.elapsed_s:.1f} s" + (f" of {time_limit_s:g} s" if time_limit_s else ""))
    return "  ".join(parts)


class ProgressPrinter:
    """Callable given to the search as ``on_progress``; :meth:`close` when the search ends."""

    def __init__(self, enabled: bool = True, stream=None, live: bool | None = None,
                 budget: int | None = None, time_limit_s: float | None = None, min_interval_s: float = 0.2):
        self.enabled = enabled
        self.stream = stream if stream is not None else sys.stderr
        self.live = (self.stream.isatty() if live is None else live) if enabled else False
        self.budget, self.time_limit_s = budget, time_limit_s
        self.min_interval_s = min_interval_s
        self._last = None          # last record seen
        self._shown = 0.0
        self._live = None

    def __call__(self, p) -> None:
        if not self.enabled:
            return
        if self.live:
            self._draw(p)
        elif self._last is not None and p.phase != self._last.phase:
            self._line(self._last)
        self._last = p

    def _line(self, p) -> None:
        self.stream.write(describe(p, self.budget, self.time_limit_s) + "\n")
        self.stream.flush()

    def _draw(self, p) -> None:
        now = time.monotonic()
        if self._live is None:
            from rich.console import Console
            from rich.live import Live
            from rich.text import Text
            self._Text = Text
            self._live = Live(Text(""), console=Console(file=self.stream), auto_refresh=False, transient=False)
            self._live.start()
        if now - self._shown < self.min_interval_s and self._last is not None and p.phase == self._last.phase:
            return
        self._shown = now
        width = max(40, self._live.console.width - 1)
        self._live.update(self._Text(describe(p, self.budget, self.time_limit_s)[:width]), refresh=True)

    def close(self) -> None:
        """Print the last state (the last phase's line; the live line's final form)."""
        if not self.enabled or self._last is None:
            return
        if self.live and self._live is not None:
            self._draw_final()
        elif not self.live:
            self._line(self._last)
        self._last = None

    def _draw_final(self) -> None:
        width = max(40, self._live.console.width - 1)
        self._live.update(self._Text(describe(self._last, self.budget, self.time_limit_s)[:width]), refresh=True)
        self._live.stop()
        self._live = None
