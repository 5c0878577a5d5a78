"""Hostile config text: every case is one line naming the file, read within a second."""
import subprocess
import sys
import time

import pytest

from muscle_sim.config import load
from muscle_sim.errors import ConfigError
from muscle_sim.yaml_input import MAX_ALIASES, MAX_DEPTH, parse_yaml_bytes, shorten

from conftest import DEMO


def _one_line_error(data: bytes) -> str:
    t0 = time.perf_counter()
    with pytest.raises(ConfigError) as info:
        parse_yaml_bytes(data, "config 'x.yaml'")
    message = str(info.value)
    assert "\n" not in message and message.startswith("config 'x.yaml': ") and len(message) < 200
    assert time.perf_counter() - t0 < 5.0            # bounded work, not a speed goal
    return message


def test_duplicate_keys_are_refused_naming_the_key_and_line():
    # YAML 1.2 spec, section 3.2.1.1: mapping keys are unique
    message = _one_line_error(b"plant:\n  supply_pressure: 6 bar\n  supply_pressure: 9 bar\n")
    assert "'supply_pressure' appears twice" in message and "line 3" in message


def test_the_demo_config_has_no_duplicate_keys_and_reads_as_before():
    import yaml
    assert parse_yaml_bytes(DEMO.read_bytes(), "demo") == yaml.safe_load(DEMO.read_text())


def test_alias_expansion_bomb_is_refused():
    # the "billion laughs" pattern: each level refers to the one below ten times (common practice
    # caps alias use in untrusted YAML)
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x, x]"]
    for i in range(1, 9):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * 9) + "]")
    message = _one_line_error("\n".join(lines).encode())
    assert "aliases" in message or "alias expansion" in message


def test_a_few_aliases_within_budget_still_read():
    assert parse_yaml_bytes(b"a: &v 3\nb: *v\n", "t") == {"a": 3, "b": 3}
    assert MAX_ALIASES >= 10


def test_deep_nesting_and_non_utf8_and_nul_are_one_line_errors():
    assert "nesting" in _one_line_error(b"[" * (MAX_DEPTH + 5) + b"]" * (MAX_DEPTH + 5))
    assert "nesting" in _one_line_error(b"[" * 1000 + b"]" * 1000)
    assert "UTF-8" in _one_line_error(b"plant: \xff\xfe\n")
    assert "NUL" in _one_line_error(b"plant: a\x00b\n")
    assert "not valid YAML" in _one_line_error(b"plant: [1, 2\n")


def test_long_values_are_cut_short_in_messages():
    cut = shorten("x" * 10_000)
    assert len(cut) < 100 and "10002 characters" in cut
    message = _one_line_error(b"k" * 5000 + b": 1\n" + b"k" * 5000 + b": 2\n")
    assert len(message) < 200


def test_cli_check_gives_one_line_and_exit_2_on_a_duplicate_key(tmp_path):
    text = DEMO.read_text() + "\ntask:\n  trial_length: 800 ms\n"
    path = tmp_path / "twice.yaml"
    path.write_text(text)
    with pytest.raises(ConfigError):
        load(path)
    done = subprocess.run([sys.executable, "-m", "muscle_sim.cli", "check", str(path)],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 2 and "appears twice" in done.stderr
    assert "Traceback" not in done.stderr and len(done.stderr.strip().splitlines()) == 1
