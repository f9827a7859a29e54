"""Settings every test sees."""

import signal

import pytest


@pytest.fixture(autouse=True, scope="session")
def _ctrl_c_as_on_a_terminal():
    """SIGINT handled as in a terminal's foreground job, however the tests were started: a
    background job of a non-interactive shell, or nohup, starts with SIGINT ignored, and an
    ignored SIGINT stays ignored under tba's handlers and in every process the tests start
    (by design, tba/scans/interrupts.py), so each test that presses Ctrl-C would see it lost."""
    if signal.getsignal(signal.SIGINT) != signal.SIG_IGN:
        yield
        return
    signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
