"""Fuzz campaign (outside CI): the fuzz tests of tests/test_fuzz.py and tests/test_check_gate.py
run with many more examples, plus kill -9 of `pamjoint tune` at random moments (the first second
included), each resumed with `tune --resume DIR` alone and compared file by file, byte for byte,
with an uninterrupted run. Writes benchmarks/results/fuzz_campaign.json.

A fuzz test passes when every example gave a result or the documented one-line error: any other
exception (a traceback), a non-finite output or a hang (no result within ``HANG_SECONDS``) fails it,
and hypothesis then reports the smallest failing input.

Usage: ``python benchmarks/fuzz_campaign.py [--scale S] [--kills K]``: each fuzz test runs S times
its CI examples (``--scale 70``: 2,800 configs, 2,800 logs and profiles, 840 state files, and
2,800 episode chunks of 100 steps with adversarial actions on the single env and as many on the
vector env of 3 members: 280,000 single-env steps and 840,000 member steps).
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import platform
import random
import signal
import subprocess
import sys
import tempfile
import time
import zlib
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
                 "tests/test_check_gate.py::test_whatever_check_accepts_runs_and_resets": 20,
                 "tests/test_fuzz.py::test_arbitrary_actions_step_the_env_or_give_one_line": 40,
                 "tests/test_fuzz.py::test_arbitrary_actions_step_the_vector_env_or_give_one_line": 40}
TRIALS, SEED = 4, 7
#: A fuzz test still running after this long counts as a hang [s].
HANG_SECONDS = 7200


def _run_fuzz(test: str, scale: float) -> dict:
    """One fuzz test under pytest with its examples scaled (a fresh example database)."""
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        counts = Path(tmp) / "counts.json"          # env steps taken, written by the env-action tests
        env = {**os.environ, "PAMJOINT_FUZZ_SCALE": str(scale), "MPLBACKEND": "Agg",
               "PAMJOINT_FUZZ_COUNTS": str(counts)}
        try:
            done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider",
                                   f"--hypothesis-seed={_seed(test)}", test], cwd=ROOT, env=env,
                                  capture_output=True, text=True, timeout=HANG_SECONDS)
            passed, tail = done.returncode == 0, done.stdout.strip().splitlines()[-40:]
            hang = False
        except subprocess.TimeoutExpired:
            passed, hang, tail = False, True, [f"hang: no result within {HANG_SECONDS} s"]
        steps = json.loads(counts.read_text()) if counts.exists() else None
    out = {"examples": int(BASE_EXAMPLES[test] * scale), "passed": passed, "hang": hang,
           "failure": None if passed else "\n".join(tail), "seconds": time.perf_counter() - t0}
    if steps is not None:
        out["env_steps"] = steps
    return out


def _seed(test: str) -> int:
    """Hypothesis seed of a test: fixed by its name (``hash`` of a str changes per process)."""
    return zlib.crc32(test.encode()) % 10000


def _tune(args, out):
    return [sys.executable, "-m", "muscle_sim.cli", "tune", str(ROOT / "configs" / "flipper.yaml"),
            "--trials", str(TRIALS), "--seed", str(SEED), "--out", str(out)] + args


def _differences(full: Path, cut: Path) -> list:
    """Files of ``cut`` that differ from ``full`` byte for byte, or exist in only one of them."""
    files = {p.relative_to(full) for p in full.rglob("*") if p.is_file()}
    files |= {p.relative_to(cut) for p in cut.rglob("*") if p.is_file()}
    return [str(rel) for rel in sorted(files) if not ((full / rel).is_file() and (cut / rel).is_file()
                                                     and (full / rel).read_bytes() == (cut / rel).read_bytes())]


def _trials_done(folder: Path):
    try:
        return len(json.loads((folder / "summary.json").read_text())["trials"])
    except (OSError, ValueError, KeyError):
        return None


def _kills(n: int, rng: random.Random) -> dict:
    """n kill -9s of a tune at random moments, each resumed from the folder alone (or, killed
    before the folder held anything, started again with the same command) and compared with an
    uninterrupted run file by file; a quarter fall in the first second."""
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        full = Path(tmp) / "full"
        # a first run fills numba's cache, so the timed one measures a tune, not a compile
        subprocess.run(_tune([], Path(tmp) / "warm-up"), check=True, capture_output=True)
        t0 = time.perf_counter()
        subprocess.run(_tune([], full), check=True, capture_output=True)
        length = time.perf_counter() - t0
        for i in range(n):
            cut = Path(tmp) / f"cut{i}"
            at = rng.uniform(0.0, 1.0) if i < n // 4 else rng.uniform(0.0, length)
            proc = subprocess.Popen(_tune([], cut), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            time.sleep(at)
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
            run = {"kill_after_s": at, "trials_done_at_kill": _trials_done(cut),
                   "resumable": (cut / "tune_options.json").exists()}
            if run["resumable"]:
                done = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "tune", "--resume", str(cut)],
                                      capture_output=True, text=True)
                run["resume_exit"] = done.returncode
                run["differing_files"] = _differences(full, cut) if done.returncode == 0 else None
                ok = done.returncode == 0 and not run["differing_files"]
            else:
                # killed before the folder held anything to resume: starting the same command
                # again is the answer, and must give the uninterrupted run's folder
                empty = not cut.exists() or not any(p for p in cut.rglob("*") if p.is_file() and
                                                    not p.name.endswith(".part"))
                again = subprocess.run(_tune([], cut), capture_output=True, text=True)
                run["restart_exit"] = again.returncode
                run["differing_files"] = _differences(full, cut) if again.returncode == 0 else None
                ok = empty and again.returncode == 0 and not run["differing_files"]
            run["identical_or_empty"] = bool(ok)
            results.append(run)
    return {"kills": n, "uninterrupted_seconds": length, "identical": sum(r["identical_or_empty"] for r in results),
            "resumed": sum(r["resumable"] for r in results), "runs": results}


def _source_digest() -> str:
    """Hash of the package sources: a campaign is only sound if they stay the same throughout
    (a kill resumed by changed code is not a resume)."""
    digest = hashlib.sha256()
    for path in sorted(list((ROOT / "muscle_sim").rglob("*.py")) + list((ROOT / "controllers").rglob("*.py"))):
        digest.update(str(path.relative_to(ROOT)).encode() + b"\0" + path.read_bytes())
    return digest.hexdigest()[:16]


def main(argv=None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scale", type=float, default=25.0, help="examples relative to CI's (default 25)")
    parser.add_argument("--kills", type=int, default=20, help="kill -9s of a tune run (default 20)")
    parser.add_argument("--kills-only", action="store_true",
                        help="only the kill -9 part, written to results/fuzz_campaign_kills.json")
    args = parser.parse_args(argv)
    rng = random.Random(11)
    t0 = time.perf_counter()
    source = _source_digest()
    if args.kills_only:
        kills = _kills(args.kills, rng)
        print(f"kill -9: {kills['identical']} of {kills['kills']} identical to the uninterrupted run")
        out = {"benchmark": "fuzz_campaign_kills", "python": platform.python_version(),
               "machine": platform.machine(), "source_digest": source,
               "source_changed_during_run": _source_digest() != source, "kill_resume": kills,
               "wall_seconds": time.perf_counter() - t0}
        write_json_atomic(ROOT / "benchmarks" / "results" / "fuzz_campaign_kills.json", out)
        return out
    fuzz = {name: _run_fuzz(name, args.scale) for name in BASE_EXAMPLES}
    for name, r in fuzz.items():
        print(f"{name}: {r['examples']} examples, {'ok' if r['passed'] else 'FAILED: ' + r['failure']} "
              f"({r['seconds']:.0f} s)", flush=True)
    kills = _kills(args.kills, rng)
    print(f"kill -9: {kills['identical']} of {kills['kills']} identical to the uninterrupted run (resumed, or "
          f"started again where the kill left nothing to resume)")
    out = {"benchmark": "fuzz_campaign", "python": platform.python_version(), "machine": platform.machine(),
           "scale": args.scale, "source_digest": source, "source_changed_during_run": _source_digest() != source,
           "fuzz": fuzz, "kill_resume": kills,
           "summary": {"examples": sum(r["examples"] for r in fuzz.values()),
                       "env_steps": sum(r.get("env_steps", {}).get("single_env_steps", 0)
                                        + r.get("env_steps", {}).get("vector_member_steps", 0) for r in fuzz.values()),
                       "fuzz_tests_failed": [n for n, r in fuzz.items() if not r["passed"]],
                       "hangs": sum(r["hang"] for r in fuzz.values()),
                       "kills_identical": f"{kills['identical']} of {kills['kills']}"},
           "wall_seconds": time.perf_counter() - t0}
    write_json_atomic(ROOT / "benchmarks" / "results" / "fuzz_campaign.json", out)
    return out


if __name__ == "__main__":
    main()
