"""The allocator tuning `straind run` applies (straind.memory)."""

from __future__ import annotations

import os
import platform
import subprocess
import sys

import pytest

PROBE = ("from straind.memory import tune_allocator; import sys; "
         "sys.stdout.write(str(tune_allocator()))")


def _probe(env: dict[str, str]) -> str:
    r = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True,
                       env=env, timeout=60)
    assert r.returncode == 0, r.stderr
    return r.stdout


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="M_TOP_PAD is a glibc setting")
def test_glibc_accepts_the_top_pad() -> None:
    env = {k: v for k, v in os.environ.items() if k != "MALLOC_TOP_PAD_"}
    assert _probe(env) == "True"       # mallopt(3): returns 1 on success


def test_an_operator_setting_wins() -> None:
    # glibc's own environment variable (mallopt(3)) is left to the operator
    assert _probe({**os.environ, "MALLOC_TOP_PAD_": "1048576"}) == "False"
