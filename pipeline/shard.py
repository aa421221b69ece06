"""Which slice of the plan this process runs: ``--shard i/N``, or ``auto`` from a scheduler's environment.

Batch schedulers start the same command many times and tell each copy its index in environment
variables. ``auto`` reads them, so one job script serves every array task and no shell arithmetic can
pick the wrong slice:

- Slurm job arrays set ``SLURM_ARRAY_TASK_ID``, ``SLURM_ARRAY_TASK_COUNT``, ``SLURM_ARRAY_TASK_MIN``,
  ``SLURM_ARRAY_TASK_MAX`` and (for ``--array=a-b:s``) ``SLURM_ARRAY_TASK_STEP``. With ``auto`` the shard
  is the task's position in the array and the count its size, so ``--array=1-4`` and ``--array=0-6:2``
  work as well as ``--array=0-3``. With ``auto/N`` the task id itself is the shard number (ids 0 to
  N-1), so a single failed task can be submitted again alone (``--array=2``).
- Kubernetes Indexed Jobs set ``JOB_COMPLETION_INDEX`` (0-based) but not the number of completions, so
  the count is given on the command line: ``auto/N``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

from .errors import UsageError

_SLURM_ID = "SLURM_ARRAY_TASK_ID"
_SLURM_COUNT = "SLURM_ARRAY_TASK_COUNT"
_K8S_INDEX = "JOB_COMPLETION_INDEX"

_AUTO_HINT = (
    "submit the command as a job array (Slurm: sbatch --array=0-3; Kubernetes: an Indexed Job with "
    "--shard auto/N, N = completions), or give the slice yourself with --shard i/N"
)


@dataclass(frozen=True)
class Shard:
    """Slice ``index`` of ``count`` (0-based), and where the numbers came from (for the log)."""

    index: int
    count: int
    source: str = "command line"

    @property
    def pair(self) -> tuple[int, int]:
        return (self.index, self.count)

    def __str__(self) -> str:
        return f"{self.index}/{self.count}"


def parse_shard(text: str, environ: Mapping[str, str]) -> Shard:
    """Read a ``--shard`` value: ``i/N``, ``auto`` or ``auto/N``.

    Parameters
    ----------
    text : str
        The option's value.
    environ : mapping
        The process environment (``os.environ``); only read for ``auto``.

    Raises
    ------
    UsageError
        The value is malformed, out of range, or ``auto`` finds no scheduler index (or an inconsistent one).
    """
    head, _, tail = text.strip().partition("/")
    if head == "auto":
        count = _count(tail, text) if tail else None
        return _from_environment(environ, count)
    try:
        index, count = int(head), int(tail)
    except ValueError:
        raise UsageError(f"--shard must look like i/N (e.g. 0/4), auto or auto/N, got {text!r}") from None
    if count < 1 or not 0 <= index < count:
        raise UsageError(f"--shard i/N needs 0 <= i < N, got {text!r}")
    return Shard(index, count)


def _count(tail: str, text: str) -> int:
    try:
        count = int(tail)
    except ValueError:
        raise UsageError(f"--shard auto/N needs a whole number N, got {text!r}") from None
    if count < 1:
        raise UsageError(f"--shard auto/N needs N >= 1, got {text!r}")
    return count


def _from_environment(environ: Mapping[str, str], count: int | None) -> Shard:
    slurm = _SLURM_ID in environ
    k8s = _K8S_INDEX in environ
    if slurm and k8s:
        raise UsageError(
            f"--shard auto: both {_SLURM_ID} and {_K8S_INDEX} are set, so the scheduler is ambiguous",
            hint="give the slice yourself with --shard i/N",
        )
    if slurm:
        shard = _from_slurm(environ, count)
    elif k8s:
        if count is None:
            raise UsageError(
                f"--shard auto: {_K8S_INDEX} is set but the number of shards is not",
                hint="Kubernetes does not pass the completion count to a pod: use --shard auto/N, N = completions",
            )
        shard = Shard(_whole(environ, _K8S_INDEX), count, f"{_K8S_INDEX}={environ[_K8S_INDEX]}")
    else:
        raise UsageError(
            f"--shard auto: no scheduler index in the environment (neither {_SLURM_ID} with {_SLURM_COUNT} "
            f"nor {_K8S_INDEX} is set)",
            hint=_AUTO_HINT,
        )
    if not 0 <= shard.index < shard.count:
        raise UsageError(f"--shard auto: index {shard.index} from {shard.source} is not below the count {shard.count}")
    return shard


def _from_slurm(environ: Mapping[str, str], count: int | None) -> Shard:
    task = _whole(environ, _SLURM_ID)
    if count is not None:  # auto/N: the task ids are the shard numbers, so one task can be rerun alone
        return Shard(task, count, f"{_SLURM_ID}={task}, of {count} shards")
    if _SLURM_COUNT not in environ:
        raise UsageError(
            f"--shard auto: {_SLURM_ID} is set but {_SLURM_COUNT} is not",
            hint="use --shard auto/N, N = the number of shards (task ids 0 to N-1)",
        )
    tasks = _whole(environ, _SLURM_COUNT)
    first = _whole(environ, "SLURM_ARRAY_TASK_MIN") if "SLURM_ARRAY_TASK_MIN" in environ else 0
    step = _whole(environ, "SLURM_ARRAY_TASK_STEP") if "SLURM_ARRAY_TASK_STEP" in environ else 1
    if "SLURM_ARRAY_TASK_MAX" in environ and _whole(environ, "SLURM_ARRAY_TASK_MAX") != first + (tasks - 1) * step:
        raise UsageError(
            f"--shard auto: the Slurm array is not an evenly spaced range (min {first}, max "
            f"{environ['SLURM_ARRAY_TASK_MAX']}, step {step}, {tasks} tasks), so task ids do not map to shards",
            hint="submit with --array=0-(N-1), or use --shard auto/N to take task ids as shard numbers",
        )
    offset = task - first
    if step < 1 or offset % step:
        raise UsageError(f"--shard auto: Slurm task {task} is not on the array's step {step} from {first}")
    return Shard(offset // step, tasks, f"{_SLURM_ID}={task} of {_SLURM_COUNT}={tasks}")


def _whole(environ: Mapping[str, str], name: str) -> int:
    value = environ[name]
    try:
        return int(value)
    except ValueError:
        raise UsageError(f"--shard auto: {name}={value!r} is not a whole number") from None
