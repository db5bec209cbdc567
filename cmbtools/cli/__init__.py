"""The ``cmbtools`` command-line tool.

Each subcommand lives in its own module under :mod:`cmbtools.cli` and
provides ``HELP`` (one line), ``add_arguments(parser)`` and ``run(args) -> int``.
Command modules import the heavy scientific modules inside ``run`` so that
``cmbtools --help`` is fast.  This module only parses arguments and reports
errors; it contains no physics.

Error policy: any :class:`~cmbtools.exceptions.CmbtoolsError` (bad input, an
output that exists, an ill-conditioned matrix, ...), any operating-system
error on a file and running out of memory become one line on standard error
(line breaks in a message are replaced by spaces) and exit status 2.  With
``--debug`` (before or after the subcommand) the traceback is shown instead.  An unexpected exception is an
internal error: one line, exit status 1.
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
import sys
import threading
import warnings

from cmbtools._version import __version__

__all__ = ["main", "run", "build_parser"]

#: Subcommands, in the order ``--help`` lists them: (name, module under cmbtools.cli).
COMMANDS = (
    ("mask", "mask"), ("inspect", "inspect"),
    ("physics", "physics"),
    ("spectrum", "spectrum"),
    ("validate", "validate"),
    ("simulate", "simulate"),
)


def _one_line(text) -> str:
    """``text`` with its line breaks replaced by spaces (error reports are one line)."""
    return " ".join(part.strip() for part in str(text).splitlines() if part.strip())


class _Parser(argparse.ArgumentParser):
    """ArgumentParser whose usage errors are one line and exit status 2."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {_one_line(message)} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="cmbtools",
        description="Angular power spectra of CMB temperature maps on the HEALPix sphere.",
    )
    parser.add_argument("--version", action="version", version=f"cmbtools {__version__}")
    parser.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name, module_name in COMMANDS:
        module = importlib.import_module(f"cmbtools.cli.{module_name}")
        p = sub.add_parser(name, help=module.HELP, description=getattr(module, "DESCRIPTION", module.HELP))
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show the full traceback on errors")
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None):
    from cmbtools.exceptions import CmbtoolsWarning

    kind = "warning" if issubclass(category, CmbtoolsWarning) else category.__name__
    print(f"cmbtools: {kind}: {_one_line(message)}", file=sys.stderr if file is None else file)


#: Options that name files a command reads, and options that name files it writes.
_INPUT_OPTIONS = ("template", "map", "map2", "mask", "mask2", "info", "from_mask", "from_map", "holes", "beam", "beam2",
                  "theory",
                  "noise_spectrum", "noise_maps", "half_difference", "spectrum", "hits", "pol_mask",
                  "pol_mask2", "hits2", "noise_variance", "noise_variance2", "covariance_from",
                  "harmonic_filter", "transfer")
_OUTPUT_OPTIONS = ("output", "fits", "figure", "table", "json_file", "write_spectrum", "write_noise_spectrum",
                   "operator_cache", "covariance", "transfer_table")


def _refuse_inputs_as_outputs(args):
    """An output that is one of the inputs is refused, even with --overwrite: inputs are never modified."""
    import os

    from cmbtools.exceptions import OutputPathError

    inputs = []
    for k in _INPUT_OPTIONS:
        value = getattr(args, k, None)
        inputs += [value] if isinstance(value, str) else [v for v in (value or ()) if isinstance(v, str)]
    inputs = [p for p in inputs if os.path.isfile(p)]
    for key in _OUTPUT_OPTIONS:
        out = getattr(args, key, None)
        if not isinstance(out, str) or not os.path.exists(out):
            continue
        if key != "operator_cache" and not getattr(args, "overwrite", False):
            continue  # refused later as an existing output, with the usual message
        for p in inputs:
            try:
                same = os.path.samefile(out, p)
            except OSError:
                continue
            if same:
                raise OutputPathError(out, "is also an input of this command; cmbtools never writes over its inputs")


def _silence_stdout():
    """Point standard output at /dev/null, so that the interpreter's final flush does not fail again."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):
        pass


class _InterruptGuard:
    """Ctrl-C ends a command within ``GRACE`` seconds, whatever the command was doing.

    The first SIGINT raises ``KeyboardInterrupt`` as usual (outputs are
    cleaned up, the pool's workers stopped, one line printed, status 130).  It
    also arms a daemon timer: should the process still be alive ``GRACE``
    seconds later (a lock of a process pool taken when the interrupt arrived,
    a thread joined at exit), the timer prints the line if it was not printed
    and ends the process with status 130.  Only the process that installed the
    guard acts on it (forked workers keep the default behaviour), and only
    when ``main`` runs in the main thread with Python's default handler.
    """

    GRACE = 15.0

    def __init__(self, prog):
        self.prog = prog
        self.reported = False
        self._pid = os.getpid()
        self._old = None
        self._timer = None
        if threading.current_thread() is threading.main_thread() and \
                signal.getsignal(signal.SIGINT) is signal.default_int_handler:
            self._old = signal.signal(signal.SIGINT, self._on_interrupt)

    def _on_interrupt(self, signum, frame):
        if os.getpid() == self._pid and self._timer is None:
            self._timer = threading.Timer(self.GRACE, self._end)
            self._timer.daemon = True
            self._timer.start()
        raise KeyboardInterrupt

    def _end(self):  # pragma: no cover - runs only when an interrupted command hangs
        if not self.reported:
            os.write(2, f"{self.prog}: interrupted\n".encode())
        os._exit(130)

    def uninstall(self):
        if self._timer is not None and (hasattr(sys, "ps1") or sys.flags.interactive):
            self._timer.cancel()  # an interactive session goes on after an interrupted command
        if self._old is not None:
            signal.signal(signal.SIGINT, self._old)
            self._old = None


def main(argv=None) -> int:
    """Run the command line; return the exit status."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        print("cmbtools: error: give a command, e.g. 'cmbtools mask --help'", file=sys.stderr)
        return 2
    from cmbtools.exceptions import CmbtoolsError

    prog = f"cmbtools {args.command}"
    debug = getattr(args, "debug", False)
    old_show = warnings.showwarning
    warnings.showwarning = _show_warning
    guard = _InterruptGuard(prog)
    try:
        _refuse_inputs_as_outputs(args)
        status = int(args._run(args) or 0)
        sys.stdout.flush()  # here, so that a closed pipe is reported below and not at exit
        return status
    except CmbtoolsError as exc:
        if debug:
            raise
        print(f"{prog}: error: {_one_line(exc)}", file=sys.stderr)
        return 2
    except BrokenPipeError:  # the reader went away (`cmbtools ... | head`): stop quietly, as Unix tools do
        _silence_stdout()
        return 128 + 13  # as a process stopped by SIGPIPE
    except OSError as exc:
        if debug:
            raise
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        print(f"{prog}: error: {_one_line(f'{where}{exc.strerror or exc}')}", file=sys.stderr)
        return 2
    except MemoryError as exc:  # an allocation the memory estimates did not foresee
        if debug:
            raise
        detail = f" ({_one_line(exc)})" if str(exc) else ""
        print(f"{prog}: error: out of memory{detail}; lower nside/lmax or free some memory", file=sys.stderr)
        return 2
    except Warning as exc:  # a warning promoted to an error by the user's warning filters
        if debug:
            raise
        print(f"{prog}: error: {_one_line(exc)} (a warning turned into an error by the warning filters)", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        guard.reported = True
        print(f"{prog}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so in one line
        if debug:
            raise
        print(f"{prog}: internal error: {type(exc).__name__}: {_one_line(exc)} (run with --debug for the traceback)",
              file=sys.stderr)
        return 1
    finally:
        warnings.showwarning = old_show
        guard.uninstall()


def run() -> None:
    """Entry point of the ``cmbtools`` command: run :func:`main` and exit with its status.

    After Ctrl-C (status 130) the outputs are already cleaned up and the pool's
    workers killed; the process then runs the ``atexit`` functions (which
    release the pool's semaphores) for at most ``EXIT_WAIT`` seconds and ends
    with ``os._exit``, without the interpreter's thread-joining exit handlers.
    Those can wait forever: when the interrupt lands just after a lock of a
    process pool's futures was taken and before its ``with`` block was entered,
    CPython leaves the lock held, and the pool's exit handler then joins a
    manager thread blocked on it (seen once in 8 interrupted runs of
    ``validate --workers 2`` under load).
    """
    status = main()
    if status != 130:
        sys.exit(status)
    import atexit

    clean_up = threading.Thread(target=atexit._run_exitfuncs, daemon=True)
    clean_up.start()
    clean_up.join(EXIT_WAIT)
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed or broken pipe: nothing more to say
            pass
    os._exit(130)


#: Seconds an interrupted command gives its ``atexit`` functions before it ends (:func:`run`).
EXIT_WAIT = 5.0


if __name__ == "__main__":  # pragma: no cover
    run()
