"""Progress reporting: a bar on a terminal, plain lines in logs."""
from __future__ import annotations

import sys
import threading
import time
from typing import TextIO


class Progress:
    """Count work done and report it on ``stream`` (stderr by default).

    On a terminal a single bar is redrawn in place; otherwise (log files, CI,
    Snakemake logs) a plain line is printed at every 10 % step. Call it with the
    number of items just finished; use it as the ``progress`` callback that the
    ``fitting`` functions accept.
    """

    def __init__(self, total: int, label: str, stream: TextIO | None = None,
                 enabled: bool = True) -> None:
        self.total = max(int(total), 0)
        self.label = label
        self.done = 0
        self.stream = stream or sys.stderr
        self.enabled = enabled and self.total > 0
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._next_step = 10
        self._t0 = time.monotonic()
        self._lock = threading.Lock()   # called from several threads (slabs fitted side by side)

    def __call__(self, n: int = 1) -> None:
        if not self.enabled:
            return
        with self._lock:
            self._report(n)

    def _report(self, n: int) -> None:
        self.done = min(self.total, self.done + int(n))
        pct = 100.0 * self.done / self.total
        if self.tty:
            width = 30
            fill = int(width * self.done / self.total)
            self.stream.write(f"\r{self.label} [{'#' * fill}{'.' * (width - fill)}] "
                              f"{pct:5.1f}% ({self.done}/{self.total})")
            if self.done >= self.total:
                self.stream.write(f"  {time.monotonic() - self._t0:.1f} s\n")
            self.stream.flush()
        else:
            if pct >= self._next_step:  # one line per call, however many steps it crossed
                self.stream.write(f"{self.label}: {int(pct)}% ({self.done}/{self.total})\n")
                self._next_step = (int(pct) // 10 + 1) * 10
            self.stream.flush()
