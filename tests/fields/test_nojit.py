"""The numba kernels' Python bodies, run with the JIT disabled.

Coverage tools and debuggers only see numba kernels when ``NUMBA_DISABLE_JIT=1``; and a kernel
whose Python body disagrees with its compiled form (integer division, typing, prange writes)
is a latent bug. This test runs a small set of numba-heavy tests, each checked against an
outside reference in its own file (IGRF against ppigrf, the equivalent-source lattice operator
against the direct 1/r sum (the direct-sum and Jacobian kernels included), the chord deviation against hand cases, terrain against harmonica
prisms and the Hammer ring), in a subprocess with the JIT off.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

#: Small, numba-heavy tests (each a few seconds at most without the JIT).
NODES = [
    "tests/fields/magnetic/test_igrf.py::test_broadcasting_matches_pointwise",
    "tests/fields/magnetic/test_igrf.py::test_field_signs_by_hemisphere",
    "tests/reference/test_igrf_ppigrf.py::test_random_points_agree_with_ppigrf",
    "tests/fields/harmonic/test_eqsources.py::test_lattice_operator_small_case",
    "tests/fields/magnetic/test_diurnal.py::test_chord_deviation_hand_cases",
    "tests/reference/test_terrain.py::test_single_hill_and_pit_against_harmonica_prisms",
    "tests/reference/test_terrain.py::test_hammer_ring_hill_and_valley",
]


def test_numba_kernels_pass_with_the_jit_disabled():
    env = dict(os.environ, NUMBA_DISABLE_JIT="1")
    src = str(ROOT / "src")
    env["PYTHONPATH"] = os.pathsep.join([src, env["PYTHONPATH"]]) if env.get("PYTHONPATH") else src
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "pytest",
            "-q",
            "-p",
            "no:cacheprovider",
            "-o",
            "addopts=",
            "--import-mode=importlib",
            *NODES,
        ],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    tail = (done.stdout + done.stderr)[-3000:]
    assert done.returncode == 0, tail
    assert f"{len(NODES)} passed" in done.stdout, tail
