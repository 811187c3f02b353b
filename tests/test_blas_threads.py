"""The ``aggpub`` command runs the BLAS library on one thread (``cli.one_blas_thread``).

Checked in fresh interpreters (the limit is process-wide), through threadpoolctl's own report of the
loaded BLAS libraries, so a limit that is not applied fails here.
"""

from __future__ import annotations

import os

import pytest

from aggpub.cli import BLAS_THREAD_VARIABLES

from .conftest import fresh_interpreter_json

PROBE = (
    "import json, os, aggpub.cli as c\n"
    "from threadpoolctl import threadpool_info\n"
    "applied = c.one_blas_thread()\n"
    "import scipy.linalg  # a BLAS user loaded after the call is covered too\n"
    "print(json.dumps({'applied': applied, 'env': os.environ.get('OPENBLAS_NUM_THREADS'),\n"
    "                  'threads': [i['num_threads'] for i in threadpool_info() if i['user_api'] == 'blas']}))\n"
)


def _probe(**extra) -> dict:
    return fresh_interpreter_json(PROBE, drop=BLAS_THREAD_VARIABLES, **extra)


def test_the_command_uses_one_blas_thread():
    got = _probe()
    assert got["applied"] is True and got["env"] == "1"
    assert got["threads"] and set(got["threads"]) == {1}


@pytest.mark.skipif((os.cpu_count() or 1) < 2, reason="needs two cores to tell 2 threads from the limit")
def test_a_users_own_setting_is_kept():
    got = _probe(OPENBLAS_NUM_THREADS="2")
    assert got["applied"] is False and got["env"] == "2"
    assert got["threads"] and set(got["threads"]) == {2}
