"""Shards under a real scheduler: scripts/slurm-check runs a recipe as a Slurm job array and compares bytes."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys

import pytest

from .conftest import REPO

SCRIPT = REPO / "scripts" / "slurm-check"
SBATCH = REPO / "scripts" / "rarefill-array.sbatch"
CANNOT_RUN_HERE = 77  # the script's "skip" exit code (the automake test convention, common practice)


def test_readme_shows_the_tested_sbatch_script_verbatim():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    assert SBATCH.read_text(encoding="utf-8").strip() in readme


@pytest.mark.slow
def test_slurm_job_array_collected_equals_a_single_machine_run():
    if sys.platform != "linux":
        pytest.skip(f"scripts/slurm-check needs Linux, this is {sys.platform}")
    if os.geteuid() != 0:
        pytest.skip("scripts/slurm-check needs root to install slurm-wlm and munge and to run the daemons")
    if not (shutil.which("sbatch") or shutil.which("apt-get")):
        pytest.skip("Slurm is not installed and there is no apt-get to install it")
    env = {**os.environ, "RAREFILL": f"{sys.executable} -m pipeline"}
    result = subprocess.run(
        ["bash", str(SCRIPT)], cwd=REPO, env=env, capture_output=True, text=True, timeout=3 * 3600, check=False
    )
    output = result.stdout + result.stderr
    if result.returncode == CANNOT_RUN_HERE:
        pytest.skip(next((line for line in output.splitlines() if "SKIP" in line), output.strip()))
    assert result.returncode == 0, output
    assert "PASS: the 4-task Slurm array, collected, equals the single-machine run byte for byte" in output
    for task in range(4):  # each task found its shard in Slurm's environment, none by luck of the default
        assert f"task {task}: shard {task}/4 (from SLURM_ARRAY_TASK_ID={task} of SLURM_ARRAY_TASK_COUNT=4)" in output
