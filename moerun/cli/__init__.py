"""The command line: argument parsing and shared options (main), one module per command (commands), output
for people (report, summary, plot). Nothing else imports it.

``entry`` is the process entry point (the ``moerun`` script and ``python -m moerun``).  It lives here, ahead
of everything the commands import, so that its first instructions install the signal handlers: a Ctrl-C or
SIGTERM while the rest of moerun and numpy load ends the process with one line and exit 130 or 143, never
a traceback.
"""

import _signal
import sys

__all__ = ["entry", "main", "plot", "report", "summary", "commands"]

def entry() -> None:
    """Run ``moerun`` with the process's arguments; exit with its code."""
    stopping: list = []  # the first signal is acted on; later ones wait while its clean-up runs
    try:
        _install_stop_handlers(stopping)  # the first instructions: SIGTERM first (its default ends the process)
        from moerun.cli.main import run_process
    except KeyboardInterrupt as e:  # while the handlers are installed, or moerun and its libraries load
        _stopped_loading(e)
    except Exception as e:  # a library's import may wrap an interruption in an ImportError
        stop = e.__context__ if isinstance(e.__context__, KeyboardInterrupt) else None
        if stop is None and stopping:  # the chain was cut, but a signal came
            from moerun.errors import Terminated

            stop = Terminated() if stopping[0] == _signal.SIGTERM else KeyboardInterrupt()
        if stop is None:
            raise
        _stopped_loading(stop)
    run_process(stopping)


def _install_stop_handlers(stopping: list) -> None:
    """The first SIGINT raises KeyboardInterrupt, the first SIGTERM ``Terminated``; later ones are ignored
    while that one unwinds.  A signal the caller ignores (a background job's Ctrl-C) stays ignored.
    ``_signal`` is the C module under ``signal``: no Python code runs between the calls."""
    def on_signal(signum, frame):
        if stopping:
            return
        stopping.append(signum)
        if signum == _signal.SIGTERM:
            from moerun.errors import Terminated

            raise Terminated
        raise KeyboardInterrupt

    for signum in (_signal.SIGTERM, _signal.SIGINT):
        if _signal.getsignal(signum) != _signal.SIG_IGN:
            _signal.signal(signum, on_signal)


def _stopped_loading(e: KeyboardInterrupt) -> None:
    from moerun.errors import EXIT_INTERRUPTED, EXIT_TERMINATED, Terminated

    sys.stderr.write(f"\nmoerun: {'terminated' if isinstance(e, Terminated) else 'interrupted'}\n")
    raise SystemExit(EXIT_TERMINATED if isinstance(e, Terminated) else EXIT_INTERRUPTED) from None
