"""Progress as periodic lines, for logs (stderr redirected to a file, a batch job's output).

A terminal shows a live bar (tqdm, `tba.store.driver`); a file gets nothing from a bar until
the end. `ProgressLines` prints instead, every ``every`` seconds from a background thread,
one line with what is done, the rate and the time left::

    tba run: 120/540 chunks (22%), 3.1 points/s, about 2 min 15 s left

and, if it printed any such line (the work took longer than ``every``), a summary at the
end::

    tba run: 540/540 chunks (100%), 3.2 points/s, complete in 2 min 49 s

Without a known total (one long computation, ``tba branch-point``) the lines say how long it
has been working. The rate is of this invocation's points (chunks already in a resumed
store do not count); the time left is the remaining points at that rate.
"""

import sys
import threading
import time

#: seconds between lines by default (``--progress-every``)
DEFAULT_EVERY = 30.0


def duration_text(seconds):
    """``0.4 s``, ``12 s``, ``2 min 15 s``, ``3 h 5 min``."""
    if seconds < 10:
        return f"{seconds:.1f} s"
    s = int(round(seconds))
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60} s"
    return f"{s // 3600} h {s % 3600 // 60} min"


def lines_wanted(every, stream=None):
    """Lines only where no live bar can be seen: ``stream`` (default stderr) is not a
    terminal, and ``every`` > 0."""
    stream = sys.stderr if stream is None else stream
    if not every or every <= 0:
        return False
    try:
        return not stream.isatty()
    except (AttributeError, ValueError):  # no isatty, or a closed stream
        return True


class ProgressLines:
    """Periodic progress lines on ``log`` for ``prefix`` (``"tba run"``).

    ``total`` items of ``unit`` (``"chunks"``), ``done`` of them already done before this
    invocation, ``points`` (the points of the work still to do, for the rate and the time
    left; default: one per item). ``total`` None: only the elapsed time. ``every`` seconds
    between lines. A context manager: the thread starts on entry and stops on exit; the
    summary line says "complete" after a normal exit, "stopped" after an exception.
    ``extra()`` may return text to add to each line (branch points of a scan).
    """

    def __init__(self, prefix, total=None, *, unit="points", done=0, points=None, every=DEFAULT_EVERY,
                 log=None, extra=None):
        self.prefix, self.total, self.unit = prefix, total, unit
        self.done = done
        self.points_total = (total - done if total is not None else None) if points is None else points
        self.points_done = 0
        self.every = float(every)
        self.log = sys.stderr if log is None else log
        self.extra = extra
        self.printed = 0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None
        self._t0 = None

    # -- counting (the computing thread) ---------------------------------------------------
    def update(self, items=1, points=None):
        with self._lock:
            self.done += items
            self.points_done += items if points is None else points

    # -- the lines -------------------------------------------------------------------------
    def _elapsed(self):
        return time.perf_counter() - self._t0

    def _rate(self, elapsed):
        return self.points_done / elapsed if elapsed > 0 else 0.0

    def line(self, final=None):
        """The text of one line; ``final`` "complete" or "stopped" for the summary."""
        with self._lock:
            done, points_done = self.done, self.points_done
        elapsed = self._elapsed()
        extra = self.extra() if self.extra is not None else ""
        extra = f", {extra}" if extra else ""
        if self.total is None:
            if final is None:
                return f"{self.prefix}: working{extra}, {duration_text(elapsed)} elapsed"
            return f"{self.prefix}: {final}{extra} after {duration_text(elapsed)}"
        pct = 100.0 * done / self.total if self.total else 100.0
        pct_text = f"{pct:.0f}%" if done == self.total or pct < 99.5 else "99%"
        rate = self._rate(elapsed)
        head = (f"{self.prefix}: {done}/{self.total} {self.unit} ({pct_text}){extra}, "
                f"{rate:.3g} points/s")
        if final == "complete":
            return f"{head}, complete in {duration_text(elapsed)}"
        if final is not None:
            return f"{head}, {final} after {duration_text(elapsed)}"
        left = self.points_total - points_done if self.points_total is not None else None
        if not points_done or left is None:
            return f"{head}, time left not known yet"
        if left <= 0:  # the items are done, what follows them is not (a scan's branch points)
            return f"{head}, finishing"
        return f"{head}, about {duration_text(max(left, 0) / rate)} left"

    def _print(self, text):
        try:
            print(text, file=self.log, flush=True)
        except (OSError, ValueError):  # the log went away (a closed pipe): stop printing
            self._stop.set()
            return
        self.printed += 1

    def _run(self):
        while not self._stop.wait(self.every):
            self._print(self.line())

    # -- start and stop --------------------------------------------------------------------
    def start(self):
        self._t0 = time.perf_counter()
        self._thread = threading.Thread(target=self._run, name=f"{self.prefix} progress",
                                        daemon=True)
        self._thread.start()
        return self

    def stop(self, final="complete"):
        """Stop the thread; print the summary line if any line was printed."""
        if self._thread is None:
            return
        self._stop.set()
        self._thread.join()
        self._thread = None
        if self.printed and final is not None:
            self._print(self.line(final))

    def __enter__(self):
        return self.start()

    def __exit__(self, kind, value, tb):
        self.stop("complete" if kind is None else "stopped")
        return False
