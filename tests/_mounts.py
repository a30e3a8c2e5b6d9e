"""A real tmpfs mounted for one test (root with mount permission only; skipped otherwise)."""

from __future__ import annotations

import contextlib
import os
import subprocess
from pathlib import Path

import pytest


@contextlib.contextmanager
def mounted_tmpfs(folder: Path, options: str):
    """Mount a tmpfs with `options` (e.g. ``"size=256k"``, ``"ro,size=64k"``) on `folder` while inside."""
    if os.geteuid() != 0:
        pytest.skip("mounting a tmpfs needs root")
    result = subprocess.run(["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(folder)], capture_output=True,
                            text=True)
    if result.returncode != 0:
        pytest.skip(f"mounting a tmpfs ({options}) is not permitted here: {result.stderr.strip()}")
    try:
        yield folder
    finally:
        subprocess.run(["umount", str(folder)], capture_output=True)
