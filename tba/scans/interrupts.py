"""Ctrl-C (SIGINT) and SIGTERM as exceptions raised only where that is safe.

Python raises KeyboardInterrupt wherever the main thread is when the signal's handler runs.
That can be inside Python code called back from compiled code: numba builds the exceptions
of nopython functions by calling a Python function, and when KeyboardInterrupt is raised
there, the compiled function returns with the exception still set ("SystemError:
CPUDispatcher(...) returned a result with an exception set"): a traceback, exit code 1, and
the interrupt is lost. With `installed` handlers:

* inside numba's own Python code (a frame of the numba package on the stack) a signal is
  noted and raised at the first Python call or return outside numba (a one-shot profile
  function of the main thread). Compiled functions that release the GIL run numba's Python
  code on their way out (boxing a new array calls ``_numba_unpickle``), and a signal that
  arrives during the compiled part is handled there; a retry by a timer thread would come
  back at the same place (that thread gets the GIL when the next compiled call releases
  it). Where a profiler is already installed the signal is instead sent again `RETRY`
  seconds later, until it arrives in plain Python code;
* inside a `deferred` block (a chunk being written to the store) it is raised when the
  block ends, so that what the block writes is written whole;
* where Python swallows exceptions (a garbage-collector callback, such as the one
  dask.distributed registers, a ``__del__``, a weakref callback: they reach
  ``sys.unraisablehook``) the interrupt raised there is caught by our hook and sent again
  `RETRY` seconds later, instead of being printed and lost.

SIGINT raises KeyboardInterrupt, SIGTERM `Terminated` (a KeyboardInterrupt, so that every
clean-up of an interrupted scan applies to both); `signal_number` says which one it was
(the command line exits with 128 + that number: 130, 143). A signal that was ignored when
the handlers were installed (``nohup``, background jobs) stays ignored.
"""

import contextlib
import os
import signal
import sys
import threading

#: seconds after which a signal that arrived inside numba's Python code is sent again
RETRY = 0.02
SIGNALS = (signal.SIGINT, signal.SIGTERM)


class Terminated(KeyboardInterrupt):
    """SIGTERM (or another terminating signal) received."""

    def __init__(self, signum=signal.SIGTERM):
        super().__init__()
        self.signum = signum


_state = {"depth": 0, "pending": None, "retrying": False, "previous_hook": sys.unraisablehook}


def signal_number(exc):
    """The signal an interrupt came from (SIGINT for a plain KeyboardInterrupt)."""
    return getattr(exc, "signum", signal.SIGINT)


def signal_name(signum):
    return signal.Signals(signum).name


def _exception(signum):
    if signum == signal.SIGINT:
        exc = KeyboardInterrupt()
        exc.signum = signum
    else:
        exc = Terminated(signum)
    exc.raised_by_handler = True
    return exc


def _unraisable(unraisable):
    """sys.unraisablehook while the handlers are installed: an interrupt of ours that Python
    had to swallow is sent again; everything else goes to the previous hook."""
    exc = unraisable.exc_value
    if getattr(exc, "raised_by_handler", False):
        signum = signal_number(exc)
        _state["pending"] = signum
        _send_again(signum)
        return
    _state["previous_hook"](unraisable)


def caused_by_interrupt(exc):
    """True if ``exc`` was raised because of an interrupt (one in its chain of causes), as
    numba's SystemError is when KeyboardInterrupt hits its Python callbacks."""
    seen = set()
    while exc is not None and id(exc) not in seen:
        if isinstance(exc, KeyboardInterrupt):
            return True
        seen.add(id(exc))
        exc = exc.__cause__ or exc.__context__
    return False


def _numba_root():
    numba = sys.modules.get("numba")
    return os.path.dirname(numba.__file__) + os.sep if numba is not None else None


def _in_numba(frame):
    root = _numba_root()
    while root is not None and frame is not None:
        if frame.f_code.co_filename.startswith(root):
            return True
        frame = frame.f_back
    return False


def _send_again(signum):
    if _state["retrying"]:
        return

    def fire():
        _state["retrying"] = False
        if _state["pending"] == signum:  # not raised meanwhile (by a signal that came later)
            signal.pthread_kill(threading.main_thread().ident, signum)

    _state["retrying"] = True
    timer = threading.Timer(RETRY, fire)
    timer.daemon = True
    timer.start()


def _raise_outside_numba(frame, event, arg):
    """Profile function armed by `_handler` inside numba: the pending signal is raised at the
    first event outside numba's code (an exception raised by a profile function unsets it and
    propagates into the frame), or left to `deferred` inside such a block."""
    signum = _state["pending"]
    if signum is not None and _in_numba(frame):
        return
    sys.setprofile(None)
    if signum is None or _state["depth"] > 0:
        return
    _state["pending"] = None
    raise _exception(signum)


def _handler(signum, frame):
    if _state["depth"] > 0:
        _state["pending"] = signum
        return
    if _in_numba(frame):
        _state["pending"] = signum
        if sys.getprofile() is None:
            sys.setprofile(_raise_outside_numba)
        else:
            _send_again(signum)
        return
    _state["pending"] = None
    raise _exception(signum)


def install():
    """Install the handlers for SIGINT and SIGTERM (in the main thread; elsewhere nothing is
    done). Returns {signal: previous handler} of those it replaced."""
    if threading.current_thread() is not threading.main_thread():
        return {}
    previous = {}
    for signum in SIGNALS:
        current = signal.getsignal(signum)
        if current is _handler or current == signal.SIG_IGN or current is None:
            continue
        previous[signum] = signal.signal(signum, _handler)
    if previous and sys.unraisablehook is not _unraisable:
        _state["previous_hook"] = sys.unraisablehook
        sys.unraisablehook = _unraisable
    return previous


@contextlib.contextmanager
def installed():
    """The handlers for the duration of the block (main thread), then the previous ones."""
    hook = sys.unraisablehook
    previous = install()
    try:
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, handler)
        sys.unraisablehook = hook
        if sys.getprofile() is _raise_outside_numba:
            sys.setprofile(None)


@contextlib.contextmanager
def deferred():
    """A block that a signal does not interrupt (main thread): it is raised when the block
    ends normally."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _state["depth"] += 1
    try:
        yield
    finally:
        _state["depth"] -= 1
    pending = _state["pending"]
    if _state["depth"] == 0 and pending is not None and signal.getsignal(pending) is _handler:
        _state["pending"] = None
        raise _exception(pending)
