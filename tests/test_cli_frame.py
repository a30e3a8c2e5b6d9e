"""The command frame through the real console script."""

import shutil
import subprocess
import sys
from pathlib import Path


from fieldfix import __version__

SCRIPT = shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")


def _run(*args):
    assert SCRIPT, "the fieldfix console script is not installed"
    return subprocess.run([SCRIPT, *args], capture_output=True, text=True, timeout=120)


def test_help_names_the_job_and_the_caution():
    result = _run("--help")
    assert result.returncode == 0
    assert "not a medical device" in result.stdout
    assert "inspect corrected images" in result.stdout


def test_version():
    result = _run("--version")
    assert result.returncode == 0 and result.stdout.strip() == f"fieldfix {__version__}"


def test_unknown_command_is_one_line_exit_2():
    result = _run("no-such-command")
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1


def test_no_command_prints_help_and_exit_2():
    result = _run()
    assert result.returncode == 2 and "COMMAND" in result.stdout
