"""The one way the command-line tests run ``treeprobe``: a subprocess, as a user would, with its exit code checked."""

import subprocess
import sys


def run(*args, check_code=0):
    """Run ``python -m treeprobe.cli ARGS``; assert the exit code and return the completed process."""
    proc = subprocess.run([sys.executable, "-m", "treeprobe.cli", *map(str, args)], capture_output=True, text=True)
    assert proc.returncode == check_code, (proc.returncode, proc.stdout, proc.stderr)
    return proc
