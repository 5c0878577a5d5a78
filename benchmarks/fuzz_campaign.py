"""Fuzz campaign (outside CI): the fuzz tests of tests/test_fuzz.py and tests/test_check_gate.py
run with many more examples, plus kill -9 of `pamjoint tune` at random moments (the first second
included), each resumed with `tune --resume DIR` alone and compared byte for byte with an
uninterrupted run. Writes benchmarks/results/fuzz_campaign.json.

A fuzz test passes when every example gave a result or the documented one-line error: any other
exception (a traceback), a non-finite output or a hang (beyond the per-example deadline) fails it,
and hypothesis then reports the smallest failing input.

Usage: ``python benchmarks/fuzz_campaign.py [--scale S] [--kills K]``: each fuzz test runs S times
its CI examples (``--scale 70``: 2,800 configs, 2,800 logs and profiles, 840 state files).
"""
from __future__ import annotations

import argparse
import json
import os
import platform
import random
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from muscle_sim.records import write_json_atomic  # noqa: E402

#: Examples per fuzz test in CI (scale 1); the campaign multiplies them by ``--scale``.
BASE_EXAMPLES = {"tests/test_fuzz.py::test_mutated_configs_load_or_give_one_line": 40,
                 "tests/test_fuzz.py::test_arbitrary_yaml_text_parses_or_gives_one_line": 40,
                 "tests/test_fuzz.py::test_mutated_logs_read_finite_or_give_one_line": 40,
                 "tests/test_fuzz.py::test_mutated_profiles_read_finite_or_give_one_line": 40,
                 "tests/test_fuzz.py::test_damaged_state_files_learn_or_give_one_line": 12,
                 "tests/test_check_gate.py::test_whatever_check_accepts_runs_and_resets": 20}
TRIALS, SEED = 4, 7


def _run_fuzz(test: str, scale: float) -> dict:
    """One fuzz test under pytest with its examples scaled (a fresh example database)."""
    env = {**os.environ, "PAMJOINT_FUZZ_SCALE": str(scale), "MPLBACKEND": "Agg"}
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider",
                               f"--hypothesis-seed={abs(hash(test)) % 10000}", test], cwd=ROOT, env=env,
                              capture_output=True, text=True, timeout=7200)
    tail = done.stdout.strip().splitlines()[-40:]
    return {"examples": int(BASE_EXAMPLES[test] * scale), "passed": done.returncode == 0,
            "failure": None if done.returncode == 0 else "\n".join(tail), "seconds": time.perf_counter() - t0}


def _tune(args, out):
    return [sys.executable, "-m", "muscle_sim.cli", "tune", str(ROOT / "configs" / "flipper.yaml"),
            "--trials", str(TRIALS), "--seed", str(SEED), "--out", str(out)] + args


def _kills(n: int, rng: random.Random) -> dict:
    """n kill -9s of a tune at random moments, each resumed from the folder alone."""
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        full = Path(tmp) / "full"
        t0 = time.perf_counter()
        subprocess.run(_tune([], full), check=True, capture_output=True)
        length = time.perf_counter() - t0
        want = (full / "final_profile.csv").read_bytes(), json.loads((full / "summary.json").read_text())["trials"]
        for i in range(n):
            cut = Path(tmp) / f"cut{i}"
            at = rng.uniform(0.0, 1.0) if i < n // 2 else rng.uniform(0.0, length)   # half in the first second
            proc = subprocess.Popen(_tune([], cut), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            time.sleep(at)
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
            resumable = (cut / "tune_options.json").exists()
            if resumable:
                done = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "tune", "--resume", str(cut)],
                                      capture_output=True, text=True)
                ok = done.returncode == 0 and (cut / "final_profile.csv").read_bytes() == want[0] and \
                    json.loads((cut / "summary.json").read_text())["trials"] == want[1]
            else:
                # killed before the folder held anything to resume: starting again is the answer
                ok = not cut.exists() or not any(p for p in cut.rglob("*") if p.is_file() and
                                                 not p.name.endswith(".part"))
            results.append({"kill_after_s": at, "resumable": resumable, "identical_or_empty": bool(ok)})
    return {"kills": n, "uninterrupted_seconds": length, "identical": sum(r["identical_or_empty"] for r in results),
            "runs": results}


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", type=float, default=25.0, help="examples relative to CI's (default 25)")
    parser.add_argument("--kills", type=int, default=20, help="kill -9s of a tune run (default 20)")
    args = parser.parse_args(argv)
    rng = random.Random(11)
    t0 = time.perf_counter()
    fuzz = {name: _run_fuzz(name, args.scale) for name in BASE_EXAMPLES}
    for name, r in fuzz.items():
        print(f"{name}: {r['examples']} examples, {'ok' if r['passed'] else 'FAILED: ' + r['failure']} "
              f"({r['seconds']:.0f} s)", flush=True)
    kills = _kills(args.kills, rng)
    print(f"kill -9: {kills['identical']} of {kills['kills']} resumed identical (or left nothing to resume)")
    out = {"benchmark": "fuzz_campaign", "python": platform.python_version(), "machine": platform.machine(),
           "scale": args.scale, "fuzz": fuzz, "kill_resume": kills,
           "summary": {"examples": sum(r["examples"] for r in fuzz.values()),
                       "fuzz_tests_failed": [n for n, r in fuzz.items() if not r["passed"]],
                       "kills_identical": f"{kills['identical']} of {kills['kills']}"},
           "wall_seconds": time.perf_counter() - t0}
    write_json_atomic(ROOT / "benchmarks" / "results" / "fuzz_campaign.json", out)
    return out


if __name__ == "__main__":
    main()
