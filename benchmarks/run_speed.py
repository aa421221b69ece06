"""End-to-end speed and memory of `rarefill run` with the default model on the seed scenes.

Prints accepted instances per minute (goal >= 120 on 2 cores), the share of attempts accepted (goal >= 60%)
and the peak resident memory of a run at two sizes: memory should stay flat as the number of jobs grows,
because images are streamed to disk chunk by chunk and never accumulated. Each size runs in its own
process so that peak memory is its own.

    python benchmarks/run_speed.py [--sizes 16 64] [--workers 1]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]

CHILD = """
import json, resource, sys, time
from pathlib import Path
from pipeline.recipe import load_recipe
from pipeline.runner import run_recipe
recipe = load_recipe(sys.argv[1]).with_output(Path(sys.argv[2])).with_limit(int(sys.argv[3]))
start = time.perf_counter()
summary = run_recipe(recipe, workers=int(sys.argv[4]))
seconds = time.perf_counter() - start
labels = json.loads((summary.output / "labels.json").read_text())
new = sum(1 for a in labels["annotations"] if a["rarefill"]["synthetic"])
peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
children_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
print(json.dumps({"seconds": seconds, "accepted_images": summary.accepted, "attempted": summary.attempted,
                  "new_instances": new, "peak_mb": max(peak_mb, children_mb)}))
"""


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--recipe", default=str(REPO / "recipes" / "more-tractors.toml"))
    parser.add_argument("--sizes", type=int, nargs="+", default=[16, 64])
    parser.add_argument("--workers", type=int, default=1)
    args = parser.parse_args()
    print(f"recipe {args.recipe}, workers {args.workers}")
    print(f"{'jobs':>6} {'seconds':>8} {'accepted':>9} {'attempts':>9} {'accept %':>9} {'inst/min':>9} {'peak MB':>8}")
    for size in args.sizes:
        with tempfile.TemporaryDirectory() as tmp:
            out = subprocess.run(
                [sys.executable, "-c", CHILD, args.recipe, str(Path(tmp) / "run"), str(size), str(args.workers)],
                capture_output=True, text=True, check=True, cwd=REPO,
            )  # fmt: skip
            row = json.loads(out.stdout.strip().splitlines()[-1])
        rate = row["new_instances"] / row["seconds"] * 60
        share = 100 * row["accepted_images"] / max(row["attempted"], 1)
        print(
            f"{size:>6} {row['seconds']:>8.1f} {row['accepted_images']:>9} {row['attempted']:>9} "
            f"{share:>9.1f} {rate:>9.1f} {row['peak_mb']:>8.0f}"
        )


if __name__ == "__main__":
    start = time.perf_counter()
    main()
    print(f"total {time.perf_counter() - start:.0f} s")
