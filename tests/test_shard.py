"""`--shard i/N` and `--shard auto`: the slice a process runs, from the command line or a scheduler's environment."""

from __future__ import annotations

import os

import pytest

from pipeline.errors import UsageError
from pipeline.shard import parse_shard

SCHEDULER_VARIABLES = (
    "SLURM_ARRAY_TASK_ID",
    "SLURM_ARRAY_TASK_COUNT",
    "SLURM_ARRAY_TASK_MIN",
    "SLURM_ARRAY_TASK_MAX",
    "SLURM_ARRAY_TASK_STEP",
    "JOB_COMPLETION_INDEX",
)


@pytest.fixture
def env(monkeypatch):
    """The real process environment, cleared of scheduler variables; returns a setter."""
    for name in SCHEDULER_VARIABLES:
        monkeypatch.delenv(name, raising=False)

    def set_vars(**values: object) -> None:
        for name, value in values.items():
            monkeypatch.setenv(name, str(value))

    return set_vars


def test_explicit_slice_ignores_the_environment(env):
    env(SLURM_ARRAY_TASK_ID=3, SLURM_ARRAY_TASK_COUNT=4)
    shard = parse_shard("1/3", os.environ)
    assert shard.pair == (1, 3) and shard.source == "command line"


@pytest.mark.parametrize("text", ["3/3", "-1/2", "0/0", "a/b", "1", "auto/0", "auto/x", "1/2/3"])
def test_malformed_or_out_of_range_slices_are_refused(env, text):
    with pytest.raises(UsageError, match="--shard"):
        parse_shard(text, os.environ)


def test_slurm_array_task_id_and_count(env):
    # sbatch --array=0-3 sets, in task 2: ID 2, COUNT 4, MIN 0, MAX 3 (SchedMD, sbatch(1) manual, "OUTPUT
    # ENVIRONMENT VARIABLES", Slurm 22.05, 2022; from memory; ID and COUNT as seen by scripts/slurm-check)
    env(SLURM_ARRAY_TASK_ID=2, SLURM_ARRAY_TASK_COUNT=4, SLURM_ARRAY_TASK_MIN=0, SLURM_ARRAY_TASK_MAX=3)
    shard = parse_shard("auto", os.environ)
    assert shard.pair == (2, 4)
    assert "SLURM_ARRAY_TASK_ID=2" in shard.source


def test_every_task_of_an_offset_or_stepped_array_gets_its_own_shard(env):
    # --array=1-4 and --array=10-16:2 both have 4 tasks; each task must map to a distinct shard 0..3
    for first, step in ((1, 1), (10, 2)):
        seen = []
        for task in range(first, first + 4 * step, step):
            env(
                SLURM_ARRAY_TASK_ID=task,
                SLURM_ARRAY_TASK_COUNT=4,
                SLURM_ARRAY_TASK_MIN=first,
                SLURM_ARRAY_TASK_MAX=first + 3 * step,
                SLURM_ARRAY_TASK_STEP=step,
            )
            seen.append(parse_shard("auto", os.environ).pair)
        assert seen == [(0, 4), (1, 4), (2, 4), (3, 4)]


def test_slurm_array_that_is_not_a_range_is_refused(env):
    # --array=0,3,5: three tasks whose ids are not evenly spaced, so an id is not a shard number
    env(SLURM_ARRAY_TASK_ID=3, SLURM_ARRAY_TASK_COUNT=3, SLURM_ARRAY_TASK_MIN=0, SLURM_ARRAY_TASK_MAX=5)
    with pytest.raises(UsageError, match="not an evenly spaced range"):
        parse_shard("auto", os.environ)


def test_slurm_with_an_explicit_count_takes_task_ids_as_shard_numbers(env):
    # resubmitting only task 2 of 8 (sbatch --array=2) makes a one-task array: auto/8 still runs shard 2/8
    env(SLURM_ARRAY_TASK_ID=2, SLURM_ARRAY_TASK_COUNT=1, SLURM_ARRAY_TASK_MIN=2, SLURM_ARRAY_TASK_MAX=2)
    assert parse_shard("auto/8", os.environ).pair == (2, 8)
    assert parse_shard("auto", os.environ).pair == (0, 1)  # its place in that one-task array
    env(SLURM_ARRAY_TASK_ID=8)
    with pytest.raises(UsageError, match="index 8 from SLURM_ARRAY_TASK_ID=8, of 8 shards is not below the count 8"):
        parse_shard("auto/8", os.environ)


def test_slurm_without_a_count_is_refused(env):
    env(SLURM_ARRAY_TASK_ID=1)
    with pytest.raises(UsageError, match="SLURM_ARRAY_TASK_COUNT is not"):
        parse_shard("auto", os.environ)


def test_kubernetes_completion_index_with_an_explicit_count(env):
    env(JOB_COMPLETION_INDEX=5)
    shard = parse_shard("auto/8", os.environ)
    assert shard.pair == (5, 8) and shard.source == "JOB_COMPLETION_INDEX=5"


def test_kubernetes_index_without_a_count_is_refused_with_the_fix(env):
    env(JOB_COMPLETION_INDEX=5)
    with pytest.raises(UsageError, match="number of shards is not") as caught:
        parse_shard("auto", os.environ)
    assert "--shard auto/N" in caught.value.hint


def test_kubernetes_index_beyond_the_count_is_refused(env):
    env(JOB_COMPLETION_INDEX=8)
    with pytest.raises(UsageError, match="index 8 .* not below the count 8"):
        parse_shard("auto/8", os.environ)


def test_auto_without_a_scheduler_is_refused_naming_the_variables(env):
    with pytest.raises(UsageError, match="no scheduler index") as caught:
        parse_shard("auto", os.environ)
    assert "SLURM_ARRAY_TASK_ID" in str(caught.value) and "JOB_COMPLETION_INDEX" in str(caught.value)
    assert "--array" in caught.value.hint


def test_both_schedulers_at_once_is_refused(env):
    env(SLURM_ARRAY_TASK_ID=0, SLURM_ARRAY_TASK_COUNT=2, JOB_COMPLETION_INDEX=1)
    with pytest.raises(UsageError, match="ambiguous"):
        parse_shard("auto/2", os.environ)


def test_non_numeric_variable_is_named(env):
    env(SLURM_ARRAY_TASK_ID="two", SLURM_ARRAY_TASK_COUNT=4)
    with pytest.raises(UsageError, match="SLURM_ARRAY_TASK_ID='two'"):
        parse_shard("auto", os.environ)
