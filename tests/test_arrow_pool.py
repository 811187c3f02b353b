"""The ``aggpub`` command takes Arrow's buffers from the C library's allocator (``cli.system_arrow_memory``).

Checked in fresh interpreters (the pool is process-wide), through pyarrow's own report of its default
pool, so a choice that is not applied fails here.
"""

from __future__ import annotations

from aggpub.cli import ARROW_POOL_VARIABLE

from .conftest import fresh_interpreter_json


def _probe(import_first: bool = False, **extra) -> dict:
    probe = (
        "import json, os, sys\n"
        + ("import pyarrow\n" if import_first else "")
        + "import aggpub.cli as c\n"
        "applied = c.system_arrow_memory()\n"
        "import pyarrow as pa\n"
        "helper = __import__('subprocess').run([sys.executable, '-c', 'import pyarrow as pa; "
        "print(pa.default_memory_pool().backend_name)'], capture_output=True, text=True).stdout.strip()\n"
        "print(json.dumps({'applied': applied, 'env': os.environ.get('ARROW_DEFAULT_MEMORY_POOL'),\n"
        "                  'pool': pa.default_memory_pool().backend_name, 'helper': helper}))\n"
    )
    return fresh_interpreter_json(probe, drop=(ARROW_POOL_VARIABLE,), **extra)


def test_the_command_uses_the_system_allocator_and_its_helpers_inherit_it():
    got = _probe()
    assert got == {"applied": True, "env": "system", "pool": "system", "helper": "system"}


def test_the_pool_is_set_when_pyarrow_was_imported_before():
    got = _probe(import_first=True)
    assert got["applied"] is True and got["pool"] == "system"


def test_a_users_own_choice_is_kept():
    import pyarrow as pa

    other = next(b for b in pa.supported_memory_backends() if b != "system")
    got = _probe(**{ARROW_POOL_VARIABLE: other})
    assert got == {"applied": False, "env": other, "pool": other, "helper": other}
