"""Per-simulation functions that run in worker processes during the Monte Carlo tests.

* :func:`run` is the Monte Carlo run that test_montecarlo starts in a
  subprocess and kills with SIGKILL.  This module is imported (not run as a
  script) by both the subprocess and the test, so the per-simulation function
  has the same module name in both and the interrupted run can be resumed in
  the test's own process.
* :func:`die_in_worker` kills the worker process that runs it (``os._exit``).

The module imports only numpy and the engine, so that spawned worker
processes start quickly.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

from cmbtools.simulate.engine import run_simulations

N_SIMS = 40
SEED = 4242
CONTEXT = {"delay_s": 0.1, "size": 4}


def slow_draw(index, rng, context):
    """Sleep a little (so the run can be killed midway), then draw a few normals."""
    time.sleep(context["delay_s"])
    return {"x": rng.standard_normal(context["size"]), "index": np.int64(index)}


def die_in_worker(index, rng, context):
    """Kill the worker process (os._exit) at one index, as many times as the context says.

    Each death appends a line to the marker file first, so that a rerun knows
    how many times the worker has died already.
    """
    marker = Path(context["marker"])
    if index == context["victim"]:
        deaths = len(marker.read_text().splitlines()) if marker.exists() else 0
        if deaths < context["deaths"]:
            with open(marker, "a") as fh:
                fh.write("died\n")
            os._exit(3)
    return {"x": rng.standard_normal(3)}


def draw_normals(index, rng, context):
    return {"x": rng.standard_normal(context["size"]), "index": np.int64(index)}


def run(run_dir, executor=None):
    return run_simulations(
        slow_draw, N_SIMS, seed=SEED, context=CONTEXT, run_dir=run_dir, executor=executor, workers=1, progress=False
    )


if __name__ == "__main__":  # pragma: no cover - the test calls run() through -c
    run(sys.argv[1])
