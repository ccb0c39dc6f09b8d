"""Command line: ``python -m bayespanel VERB ...`` (also installed as ``bayespanel``).

Verbs: ``demo``, ``describe FILE``, ``fit [FILE]`` and ``report DIR``. Exit codes: 0
success, 2 bad input (the message names the problem), 1 failure (or interrupted), 3
sampling problems under ``--strict`` (outputs are written). See docs/cli.md and
docs/guarantees.md.

This module runs a verb: warnings on one console line, SIGTERM taken as an interrupt,
errors turned into exit codes. The parser is :mod:`bayespanel.app.parser`, the verbs
:mod:`bayespanel.app.verbs`, what they print :mod:`bayespanel.app.console`, the exit codes
and option readers :mod:`bayespanel.app.cliargs`; their public names are importable here
as before.
"""

from __future__ import annotations

import contextlib
import logging
import signal
import sys
import threading
import warnings

from ..core.errors import BayespanelError, OutputError
from ..report.text import printable
from .cliargs import (EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK, EXIT_SAMPLING,  # noqa: F401
                      delimiter_option, parse_prior)
from .console import print_problems  # noqa: F401
from .parser import build_parser
from .verbs import (_strict_exit, cmd_demo, cmd_describe, cmd_design_check,  # noqa: F401
                    cmd_fit, cmd_report)


class _Printable:
    """A text stream that writes :func:`printable` text (the console output of a verb)."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text):
        return self._stream.write(printable(text))

    def __getattr__(self, name):
        return getattr(self._stream, name)


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """The console's warning display: one line (:func:`format_warning`), the message made
    :func:`printable`."""
    print(format_warning(printable(message), category), file=file or sys.stderr, flush=True)


def _show_warning_debug(message, category, filename, lineno, file=None, line=None):
    """With ``--debug``: Python's warning display (file and source line), made printable."""
    text = warnings.formatwarning(printable(message), category, filename, lineno, line)
    (file or sys.stderr).write(text)


def _terminate(signum, frame):
    raise KeyboardInterrupt(f"terminated by signal {signum}")


def format_warning(message, category) -> str:
    """A warning as the console shows it: one line, no file name or Python source line
    (``bayespanel: warning: ...``; the category is named unless it is a plain
    ``UserWarning`` or one of ours, whose messages say what they are about)."""
    text = " ".join(str(message).split())
    ours = category.__module__.startswith("bayespanel") or category is UserWarning
    return f"bayespanel: warning: {text if ours else f'{category.__name__}: {text}'}"


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.debug:  # tracebacks of fits that failed while the run went on
        log = logging.getLogger("bayespanel")
        log.setLevel(logging.DEBUG)
        log.addHandler(logging.StreamHandler(sys.stderr))
    previous = None
    if threading.current_thread() is threading.main_thread():
        # SIGTERM (a scheduler's time limit, `kill`) ends a run like Ctrl-C: the staging
        # folder is discarded and the folder keeps its earlier run (docs/guarantees.md)
        previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        return _main(args)
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


def _main(args) -> int:
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(_Printable(sys.stdout)):
            warnings.simplefilter("default")
            warnings.showwarning = _show_warning_debug if args.debug else _show_warning
            return int(args.func(args) or 0)
    except OutputError as exc:  # the input was fine; the outputs could not be written
        print(f"bayespanel: failed: {exc}", file=sys.stderr)
        return EXIT_FAILURE
    except BayespanelError as exc:
        print(f"bayespanel: error: {printable(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt as exc:
        print(f"bayespanel: interrupted{f' ({exc})' if str(exc) else ''}", file=sys.stderr)
        return EXIT_FAILURE
    except MemoryError:
        print("bayespanel: failed: out of memory (lower --draws, --chains or --ppc-draws)",
              file=sys.stderr)
        return EXIT_FAILURE
    except Exception as exc:  # a failure, not bad input: say what and how to see more
        if args.debug:
            raise
        print(f"bayespanel: failed: {type(exc).__name__}: {printable(exc)} (rerun with "
              "--debug for the traceback)", file=sys.stderr)
        return EXIT_FAILURE
