"""The README's promises: its library example runs, and CI runs its test command verbatim."""

import re
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = (ROOT / "README.md").read_text()


def _blocks(language):
    return re.findall(rf"```{language}\n(.*?)```", README, flags=re.DOTALL)


def test_library_example_runs_and_recovers_the_field(tmp_path):
    (example,) = _blocks("python")
    result = subprocess.run([sys.executable, "-c", example], capture_output=True, text=True, timeout=300,
                            cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    error_hz = float(re.search(r"B0 error in the mask: ([\d.]+) Hz", result.stdout).group(1))
    assert error_hz < 2.0


def test_ci_runs_the_readme_test_command_exactly():
    commands = [line for block in _blocks("bash") for line in block.splitlines() if "pytest" in line]
    assert len(commands) == 1
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert commands[0] in ci


def test_readme_states_the_caution():
    assert "not a medical device" in README and "inspected" in README
