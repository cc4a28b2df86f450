"""Terminal output: plain log lines, or a live bar on a terminal; quiet and verbose levels."""

from __future__ import annotations

import sys
import time

__all__ = ["Console"]


class Console:
    """Where progress and results are printed.

    Progress goes to standard error so that standard output stays clean for
    results; on a terminal each step redraws one line, otherwise each step is
    one plain line.
    """

    def __init__(self, quiet: bool = False, verbose: bool = False, stream=None):
        self.quiet = quiet
        self.verbose = verbose
        self.stream = stream or sys.stderr
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._t0 = time.monotonic()

    def step(self, message: str) -> None:
        """A progress step."""
        if self.quiet:
            return
        elapsed = time.monotonic() - self._t0
        print(f"[{elapsed:6.1f}s] {message}", file=self.stream, flush=True)

    def detail(self, message: str) -> None:
        """Only with --verbose."""
        if self.verbose and not self.quiet:
            print(message, file=self.stream, flush=True)

    def out(self, message: str = "") -> None:
        """A result line on standard output (never suppressed)."""
        print(message, flush=True)
