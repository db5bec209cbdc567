"""Interruptions, plain scripts and bad input at the process level (issue: one interface, nothing left behind).

Every test runs cmbtools as a user does, in a child process (``python -m cmbtools ...`` or a script), so that
signals, pipes, worker processes and the main-module import behave as outside the test suite.  Timing: no test
asserts on a duration; each polls for the condition it needs and uses generous time limits, so a loaded machine
makes it slower, never wrong.
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent
while not ((ROOT / "maps").is_dir() and (ROOT / "cmbtools").is_dir()):  # the repository root (tests may be nested)
    ROOT = ROOT.parent
MAPS = ROOT / "maps"

#: Time limits (seconds): far above what each step needs on a quiet machine.
SLOW_STEP = 300
QUICK_STEP = 120


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["CMBTOOLS_NUM_THREADS"] = "1"
    env.pop("PYTHONWARNINGS", None)
    return env


def cmbtools(*argv, cwd, timeout=QUICK_STEP, **kwargs):
    """Run ``python -m cmbtools argv`` to completion; return the CompletedProcess (text)."""
    return subprocess.run([sys.executable, "-m", "cmbtools", *map(str, argv)], cwd=cwd, env=_env(),
                          capture_output=True, text=True, timeout=timeout, **kwargs)


def _as_a_terminal_job():
    # a job started from a terminal has Ctrl-C at its default action; a test run launched in the background of a
    # non-interactive shell (`pytest &`) ignores SIGINT, and children inherit that: restore the default in the child
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def start_cmbtools(*argv, cwd):
    """Start ``python -m cmbtools argv`` in its own process group, SIGINT at its default (as a terminal job)."""
    return subprocess.Popen([sys.executable, "-m", "cmbtools", *map(str, argv)], cwd=cwd, env=_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, start_new_session=True,
                            preexec_fn=_as_a_terminal_job)


def wait_for(condition, timeout, what):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return
        time.sleep(0.1)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}")


def small_mask(directory, name="mask.fits", cap="0,30,70", nside=16):
    out = cmbtools("mask", "--nside", nside, "--keep-cap", cap, "-o", name, cwd=directory)
    assert out.returncode == 0, out.stderr
    return directory / name


def children_of(pid):
    out = subprocess.run(["ps", "-o", "pid=", "--ppid", str(pid)], capture_output=True, text=True).stdout
    return [int(p) for p in out.split()]


def alive(pid):
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def link_demo_maps(directory):
    (directory / "maps").symlink_to(MAPS, target_is_directory=True)


# ------------------------------------------------------------------ plain scripts and the process pool


def readme_python_block():
    text = (ROOT / "README.md").read_text()
    m = re.search(r"## Python API\n\n```python\n(.*?)```", text, re.S)
    assert m, "README has no Python API block"
    return m.group(1)


@pytest.mark.slow
def test_readme_api_block_runs_verbatim_as_a_script(tmp_path):
    # the README's API block saved as a file and run: no guard, a Monte Carlo run on the default process pool
    link_demo_maps(tmp_path)
    (tmp_path / "readme_api.py").write_text(readme_python_block())
    out = subprocess.run([sys.executable, "readme_api.py"], cwd=tmp_path, env=_env(), capture_output=True, text=True,
                         timeout=2 * SLOW_STEP)
    assert out.returncode == 0, out.stderr[-2000:]
    assert "Traceback" not in out.stderr
    assert (tmp_path / "tern_spectrum.csv").is_file() and (tmp_path / "tern_spectrum.png").is_file()
    assert len(list((tmp_path / "run").glob("sim_*.npz"))) == 100


def test_unguarded_script_running_a_cmbtools_validation_works(tmp_path):
    # a script without `if __name__ == "__main__":` whose Monte Carlo job is cmbtools' own: the workers do not
    # run the script again, so it finishes (it used to hang)
    mask = small_mask(tmp_path)
    (tmp_path / "plain.py").write_text(textwrap.dedent(f"""\
        from cmbtools import maps, spectrum, simulate
        mask = maps.read_mask({str(mask)!r})
        est = spectrum.SpectrumEstimator(mask, spectrum.Binning.uniform(2, 47, 8))
        result = simulate.validate_estimator(est, n_sims=4, seed=3, workers=2, progress=False)
        print("simulations", result.n_sims)
        """))
    out = subprocess.run([sys.executable, "plain.py"], cwd=tmp_path, env=_env(), capture_output=True, text=True,
                         timeout=SLOW_STEP)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.splitlines()[-1] == "simulations 4"
    assert out.stdout.count("simulations") == 1  # the script body ran once, not once more per worker


def test_unguarded_script_with_its_own_function_fails_at_once_with_the_fix_named(tmp_path):
    # the job needs the script itself in every worker; unguarded, each worker would start the run again:
    # a clear error instead of a hang
    (tmp_path / "own.py").write_text(textwrap.dedent("""\
        from cmbtools.simulate import run_simulations
        def draw(index, rng, context):
            return {"x": rng.normal(size=3)}
        sims = run_simulations(draw, 4, seed=1, workers=2, progress=False)
        """))
    out = subprocess.run([sys.executable, "own.py"], cwd=tmp_path, env=_env(), capture_output=True, text=True,
                         timeout=SLOW_STEP)
    assert out.returncode == 1
    last = out.stderr.strip().splitlines()[-1]
    assert last.startswith("cmbtools.exceptions.InvalidInputError: The worker processes died while starting")
    assert "if __name__ == \"__main__\":" in last and "ThreadPoolExecutor" in last


# ------------------------------------------------------------------ signals


def _start_validation(tmp_path, run_dir="run"):
    mask = small_mask(tmp_path, cap="0,30,90", nside=32)
    p = start_cmbtools("validate", mask, "--sims", 100000, "--seed", 1, "--run-dir", run_dir, "--no-progress",
                       "--workers", 2, "--threads", 1, cwd=tmp_path)
    # the workers are running once the first simulation record exists
    try:
        wait_for(lambda: any((tmp_path / run_dir).glob("sim_*.npz")) or p.poll() is not None, SLOW_STEP,
                 "the first simulation")
    except AssertionError:
        os.killpg(p.pid, signal.SIGKILL)
        p.communicate()
        raise
    assert p.poll() is None, p.communicate()[1].decode()
    return p


def test_ctrl_c_on_validate_prints_one_line_and_exits_130(tmp_path):
    p = _start_validation(tmp_path)
    workers = children_of(p.pid)
    os.killpg(p.pid, signal.SIGINT)  # what a terminal sends to the whole foreground group
    try:
        out, err = p.communicate(timeout=QUICK_STEP)
    finally:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGKILL)
            p.communicate()  # reaped, so that no later test meets it
    assert p.returncode == 130
    assert err.decode().splitlines() == ["cmbtools validate: interrupted"]
    wait_for(lambda: not any(alive(w) for w in workers), QUICK_STEP, "the workers to exit")


def test_workers_exit_when_the_validate_parent_is_killed(tmp_path):
    p = _start_validation(tmp_path)
    workers = children_of(p.pid)
    assert workers
    os.kill(p.pid, signal.SIGKILL)  # the parent alone, as the out-of-memory killer does
    try:
        # a caller reading the output must see end-of-file: no worker holds stdout/stderr open
        p.communicate(timeout=QUICK_STEP)
        wait_for(lambda: not any(alive(w) for w in workers), QUICK_STEP, "the workers to exit")
    finally:
        for w in workers:
            if alive(w):
                os.kill(w, signal.SIGKILL)


# ------------------------------------------------------------------ run directories and files


def test_validate_restart_recovers_from_a_corrupt_manifest(tmp_path):
    mask = small_mask(tmp_path)
    (tmp_path / "run").mkdir()
    (tmp_path / "run" / "run.json").write_text("{ this is not json")
    argv = ("validate", mask, "--sims", 3, "--seed", 2, "--run-dir", "run", "--no-progress", "--workers", 1,
            "--bin-width", 8)
    refused = cmbtools(*argv, cwd=tmp_path)
    assert refused.returncode == 2 and "--restart" in refused.stderr
    out = cmbtools(*argv, "--restart", cwd=tmp_path, timeout=SLOW_STEP)
    assert out.returncode == 0, out.stderr
    assert len(list((tmp_path / "run").glob("sim_*.npz"))) == 3
    assert '"seed": 2' in (tmp_path / "run" / "run.json").read_text()


def test_a_symlink_loop_is_reported_as_a_loop(tmp_path):
    (tmp_path / "a.fits").symlink_to("b.fits")
    (tmp_path / "b.fits").symlink_to("a.fits")
    out = cmbtools("inspect", "a.fits", cwd=tmp_path)
    assert out.returncode == 2
    assert out.stderr == "cmbtools inspect: error: a.fits: is a loop of symbolic links (a link that points back to itself)\n"
    (tmp_path / "dangling.fits").symlink_to("nowhere.fits")
    out = cmbtools("inspect", "dangling.fits", cwd=tmp_path)
    assert out.stderr == "cmbtools inspect: error: dangling.fits: is a symbolic link to 'nowhere.fits', which does not exist\n"


def test_an_unwritable_run_dir_is_refused_before_any_input_is_read(tmp_path):
    # /proc refuses new entries even to root; the mask does not exist: the run directory must be the first
    # thing checked, before the mask is read and the estimator built
    out = cmbtools("validate", "missing_mask.fits", "--run-dir", "/proc/cmbtools_run", "--sims", 2, cwd=tmp_path)
    assert out.returncode == 2
    assert out.stderr.startswith("cmbtools validate: error: /proc/cmbtools_run") and "not writable" in out.stderr


def test_output_into_a_closed_pipe_stops_quietly(tmp_path):
    # `cmbtools inspect MAP | head -0`: the reader is gone before the first line is written
    p = subprocess.Popen([sys.executable, "-m", "cmbtools", "inspect", str(MAPS / "tern_sky.fits")], cwd=tmp_path,
                         env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    p.stdout.close()
    err = p.stderr.read().decode()
    p.wait(timeout=QUICK_STEP)
    assert err == ""
    assert p.returncode == 128 + signal.SIGPIPE  # as a Unix tool stopped by the closed pipe


def test_simulate_removes_the_temporaries_a_killed_run_left(tmp_path):
    out_dir = tmp_path / "sims"
    out_dir.mkdir()
    # what a run killed while writing maps 0 and 7 leaves: hidden partial files of cmbtools' own naming
    stale = [out_dir / ".sky_0000.fits.k2j4x9q1.tmp.fits", out_dir / ".sky_0007.fits.a1b2c3d4.tmp.fits"]
    for p in stale:
        p.write_bytes(b"SIMPLE  =                    T partial")
    other = out_dir / ".notes.txt.a1b2c3d4.tmp.txt"  # not ours to delete
    other.write_text("keep")
    out = cmbtools("simulate", "--nside", 16, "--seed", 1, "--sims", 1, "--output-dir", out_dir, cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert not any(p.exists() for p in stale)
    assert other.exists()
    assert sorted(p.name for p in out_dir.iterdir()) == [".notes.txt.a1b2c3d4.tmp.txt", "sky_0000.fits"]


def test_a_mask_file_with_nan_pixels_is_read_with_a_warning_giving_the_count(tmp_path):
    from astropy.io import fits

    mask = small_mask(tmp_path)
    with fits.open(mask) as hdul:
        data = hdul[1].data
        column = data.columns[0].name
        values = np.array(data[column], dtype=np.float64).reshape(-1)
        values[:7] = np.nan
        hdul[1].data[column] = values.reshape(data[column].shape)
        hdul.writeto(tmp_path / "nan_mask.fits")
    out = cmbtools("mask", "--info", "nan_mask.fits", cwd=tmp_path)
    assert out.returncode == 0
    assert out.stderr == ("cmbtools: warning: nan_mask.fits: 7 mask pixels hold no number (NaN, inf or UNSEEN); "
                          "they get weight 0\n")


def test_ctrl_c_ends_a_command_whose_clean_up_hangs(tmp_path):
    # the interrupt guard of cmbtools.cli: after the first Ctrl-C a command that does not finish (here a clean-up
    # that never returns, as a process pool's lock taken when the interrupt arrived would) still ends with the one
    # line and status 130, GRACE seconds later; the bound below is eight times GRACE, for a loaded machine
    from cmbtools.cli import _InterruptGuard

    script = tmp_path / "hang.py"
    script.write_text(textwrap.dedent("""\
        import time
        from cmbtools.cli import _InterruptGuard
        guard = _InterruptGuard("cmbtools demo")
        try:  # entered before "ready": the interrupt cannot land between the two
            print("ready", flush=True)
            time.sleep(600)
        except KeyboardInterrupt:
            pass
        while True:  # a clean-up that never ends
            time.sleep(0.5)
        """))
    p = subprocess.Popen([sys.executable, str(script)], env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         start_new_session=True, preexec_fn=_as_a_terminal_job)
    try:
        assert p.stdout.readline().decode().strip() == "ready"
        t0 = time.monotonic()
        os.kill(p.pid, signal.SIGINT)
        out, err = p.communicate(timeout=8 * _InterruptGuard.GRACE)
        waited = time.monotonic() - t0
    finally:
        if p.poll() is None:
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()
    assert p.returncode == 130
    assert err.decode().splitlines() == ["cmbtools demo: interrupted"]
    assert waited >= _InterruptGuard.GRACE - 1.0  # the command had its grace period first


def test_an_interrupted_command_does_not_wait_for_exit_handlers(tmp_path):
    # cli.run ends a command that reports Ctrl-C (status 130) with os._exit once its atexit functions ran or
    # EXIT_WAIT seconds passed: the interpreter's exit handlers must not wait forever (a process pool's can, on a lock
    # left held by the interrupt). Here an exit function that would sleep for 600 s stands for the stuck one; a
    # command that ends normally runs its exit functions as usual.
    script = tmp_path / "entry.py"
    script.write_text(textwrap.dedent("""\
        import atexit, sys, time
        import cmbtools.cli as cli
        status = int(sys.argv[1])
        atexit.register(lambda: print("exit handler ran", flush=True) or (status == 130 and time.sleep(600)))
        cli.main = lambda argv=None: print("command done", flush=True) or status
        cli.run()
        """))
    for status in (130, 0):
        out = subprocess.run([sys.executable, str(script), str(status)], env=_env(), capture_output=True, text=True,
                             timeout=QUICK_STEP)
        assert out.returncode == status
        assert out.stdout.splitlines() == ["command done", "exit handler ran"]
