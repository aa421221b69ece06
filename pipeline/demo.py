"""Find the demo recipe of a source checkout (recipes/ and seed_scenes/ live beside the package)."""

from __future__ import annotations

from pathlib import Path

from .errors import UsageError
from .recipe import Recipe, load_recipe

REPO = Path(__file__).resolve().parents[1]


def demo_recipe(repo: Path = REPO) -> Recipe:
    """The validated ``recipes/demo.toml`` of the checkout rarefill runs from."""
    path = repo / "recipes" / "demo.toml"
    if not path.is_file() or not (repo / "seed_scenes" / "train.json").is_file():
        raise UsageError(
            f"the demo needs recipes/demo.toml and seed_scenes/ beside the package, not found under {repo}",
            hint="run it from a clone installed with `pip install -e .`",
        )
    return load_recipe(path)
