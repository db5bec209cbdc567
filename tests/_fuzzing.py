"""Shared pieces of the property-based tests (test_fuzz_tables.py, test_fuzz_cli_spectrum.py).

* :func:`fuzz_settings` - modest, derandomized runs in CI; many fresh random
  ones when ``$CMBTOOLS_FUZZ_EXAMPLES`` is set (e.g. 2000);
* :func:`time_limit` - a SIGALRM guard that turns a hang into an error;
* :func:`attempt` - run a reader, return its result or the CmbtoolsError it
  raised (any other exception propagates and fails the test), with the
  warnings it emitted;
* :func:`only_our_warnings` - readers speak through CmbtoolsWarning only;
* :func:`often` - a strategy that draws one value most of the time;
* :func:`run_cli`, :func:`check_cli_outcome` - run ``cmbtools`` in-process and
  check the exit status (0 or 2) and what it printed on standard error.
"""

from __future__ import annotations

import contextlib
import os
import signal
import warnings

from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

from cmbtools.exceptions import CmbtoolsError, CmbtoolsWarning

EXPLORE = int(os.environ.get("CMBTOOLS_FUZZ_EXAMPLES", "0"))


def fuzz_settings(max_examples, deadline=5000):
    """``max_examples`` derandomized examples (``deadline`` in ms, None for none), or EXPLORE random ones."""
    return settings(
        max_examples=EXPLORE or max_examples,
        derandomize=not EXPLORE,
        database=None,
        deadline=deadline,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
    )


class Hang(Exception):
    """An example ran past its time limit (not a CmbtoolsError, so the test fails)."""


@contextlib.contextmanager
def time_limit(seconds=10.0):
    def on_alarm(signum, frame):
        raise Hang(f"did not finish within {seconds} s")

    old = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


def attempt(reader, *args, **kwargs):
    """(result, error, warnings): the reader's result, or the CmbtoolsError it raised."""
    with warnings.catch_warnings(record=True) as caught, time_limit():
        warnings.simplefilter("always")
        try:
            result = reader(*args, **kwargs)
        except CmbtoolsError as exc:
            assert str(exc).strip(), "an error without a message"
            return None, exc, list(caught)
    return result, None, list(caught)


def only_our_warnings(caught):
    foreign = [f"{w.category.__name__}: {w.message}" for w in caught if not issubclass(w.category, CmbtoolsWarning)]
    assert not foreign, foreign


def often(common, *rare):
    """A strategy that draws ``common`` about four times in five and one of ``rare`` otherwise."""
    return st.one_of(*[st.just(common)] * 4, st.sampled_from(list(rare))) if rare else st.just(common)


# ---------------------------------------------------------------- the command line

def run_cli(argv, directory, seconds=60.0):
    """(status, stdout, stderr) of ``cmbtools argv`` run in-process in ``directory``, warnings printed as a user sees them."""
    import io

    from cmbtools import cli

    out, err = io.StringIO(), io.StringIO()
    with warnings.catch_warnings():
        warnings.simplefilter("default")  # as outside the test suite: warnings are printed, not raised
        # relative output names land in the scratch directory, never in the working tree
        with contextlib.chdir(directory), contextlib.redirect_stdout(out), contextlib.redirect_stderr(err), \
                time_limit(seconds):
            try:
                code = cli.main(list(argv))
            except SystemExit as exc:  # argparse: --help, --version and usage errors
                code = exc.code
    return code, out.getvalue(), err.getvalue()


def check_cli_outcome(argv, code, out, err):
    """Status 0 or 2, no traceback; a failure ends with one error line; every other line is a cmbtools warning."""
    shown = f"argv={argv!r}\nstatus={code}\nstderr:\n{err}"
    assert code in (0, 2), shown
    assert "Traceback" not in err and "internal error" not in err, shown
    lines = err.splitlines()
    if code == 2:
        assert lines, shown
        assert "error:" in lines[-1], shown
        others = lines[:-1]
    else:
        others = lines
    for line in others:
        assert line.startswith("cmbtools: warning: "), shown
