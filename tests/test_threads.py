"""Results do not depend on the BLAS thread settings: tune, plan and compare write the same bytes
with one and with two OpenBLAS/OpenMP threads, because the entry points pin BLAS to one thread."""
import os
import subprocess
import sys
from pathlib import Path

import pytest
from threadpoolctl import threadpool_info, threadpool_limits

from muscle_sim.threads import single_blas_thread

from conftest import DEMO, ROOT

COMMANDS = {
    "tune": ["tune", str(DEMO), "--trials", "3"],
    "plan": ["plan", str(DEMO), "--iterations", "15"],
    "compare": ["compare", str(DEMO), "--trials", "2"],
}


def _blas_threads() -> set:
    return {lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"}


def _run(command, threads: int, cwd: Path) -> dict:
    """Run ``pamjoint COMMAND`` in ``cwd`` with ``threads`` BLAS/OpenMP threads; every file written
    (relative path -> bytes). The output folder is relative, so reports naming it are comparable."""
    cwd.mkdir(parents=True)
    env = {**os.environ, "OPENBLAS_NUM_THREADS": str(threads), "OMP_NUM_THREADS": str(threads),
           "MKL_NUM_THREADS": str(threads), "PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg"}
    subprocess.run([sys.executable, "-m", "muscle_sim.cli", *command, "--out", "out"], cwd=cwd, env=env,
                   check=True, capture_output=True)
    out = cwd / "out"
    return {str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*")) if p.is_file()}


def test_decorated_function_runs_on_one_blas_thread_and_restores_the_limit():
    @single_blas_thread
    def inner():
        return _blas_threads()

    @single_blas_thread
    def outer():
        return _blas_threads(), inner(), _blas_threads()

    with threadpool_limits(limits=2, user_api="blas"):
        assert _blas_threads() == {2}
        assert inner() == {1}
        assert outer() == ({1}, {1}, {1})      # nested: still one thread after the inner call
        assert _blas_threads() == {2}          # restored on return


@pytest.mark.parametrize("name", sorted(COMMANDS))
def test_outputs_are_byte_identical_with_one_and_two_blas_threads(name, tmp_path):
    # reference: the same command with OPENBLAS_NUM_THREADS=1 (derived: the pin makes the thread
    # count irrelevant); tolerance: none, every file (CSV, JSON, Markdown, PNG) byte for byte
    one = _run(COMMANDS[name], 1, tmp_path / "one")
    two = _run(COMMANDS[name], 2, tmp_path / "two")
    assert one and sorted(one) == sorted(two)
    assert any(f.endswith(".png") for f in one)
    differ = [f for f in one if one[f] != two[f]]
    assert not differ, f"{len(differ)} of {len(one)} files differ between 1 and 2 BLAS threads: {differ}"
