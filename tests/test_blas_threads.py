"""The ``aggpub`` command runs the BLAS library on one thread (``cli.one_blas_thread``).

Checked in fresh interpreters (the limit is process-wide), through threadpoolctl's own report of the
loaded BLAS libraries, so a limit that is not applied fails here.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from aggpub.cli import BLAS_THREAD_VARIABLES

ROOT = Path(__file__).resolve().parents[1]
PROBE = (
    "import json, os, aggpub.cli as c\n"
    "from threadpoolctl import threadpool_info\n"
    "applied = c.one_blas_thread()\n"
    "import scipy.linalg  # a BLAS user loaded after the call is covered too\n"
    "print(json.dumps({'applied': applied, 'env': os.environ.get('OPENBLAS_NUM_THREADS'),\n"
    "                  'threads': [i['num_threads'] for i in threadpool_info() if i['user_api'] == 'blas']}))\n"
)


def _probe(**extra) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in BLAS_THREAD_VARIABLES}
    env.update(extra)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    out = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_the_command_uses_one_blas_thread():
    got = _probe()
    assert got["applied"] is True and got["env"] == "1"
    assert got["threads"] and set(got["threads"]) == {1}


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="needs two cores to tell 2 threads from the limit")
def test_a_users_own_setting_is_kept():
    got = _probe(OPENBLAS_NUM_THREADS="2")
    assert got["applied"] is False and got["env"] == "2"
    assert got["threads"] and set(got["threads"]) == {2}
