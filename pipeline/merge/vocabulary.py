"""Step 1 of a merge: one category list for the real split and every synthetic set, matched by name."""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ..dataset import Dataset, category_entry
from ..errors import DatasetError


def load_mapping(path: str | os.PathLike[str]) -> dict[str, str]:
    """Read a category mapping file: a JSON object ``{"their name": "our name"}`` of non-empty strings.

    Raises
    ------
    DatasetError
        The file is missing, not JSON, not an object, or a key or value is not a non-empty string.
    """
    path = Path(path)
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DatasetError(path, "", "mapping file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise DatasetError(path, "", f"mapping file cannot be read ({exc})") from None
    except json.JSONDecodeError as exc:
        raise DatasetError(path, "", f"malformed JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}") from None
    hint = 'a mapping file is one JSON object {"their name": "our name", ...}'
    if not isinstance(raw, dict):
        raise DatasetError(path, "", f"must be a JSON object of names, got {type(raw).__name__}", hint=hint)
    for key, value in raw.items():
        if not key:
            raise DatasetError(path, '""', "a category name must not be empty", hint=hint)
        if not isinstance(value, str) or not value:
            raise DatasetError(path, key, f"must map to a non-empty category name, got {value!r}", hint=hint)
    return dict(raw)


def merged_categories(
    real: Dataset,
    sets: Sequence[tuple[Dataset, Path]],
    mapping: Mapping[str, str],
    mapping_file: str | os.PathLike[str] | None,
) -> tuple[list[dict[str, Any]], list[dict[int, int]]]:
    """The merged categories and, per synthetic set, its category id -> merged category id.

    Parameters
    ----------
    real : Dataset
        The real split: its categories come first, with their ids.
    sets : sequence of (Dataset, Path)
        Each synthetic set with its labels file (named in errors).
    mapping : mapping
        ``{"their name": "our name"}``; a name mapped to itself is appended as a new category.
    mapping_file : path or None
        Where ``mapping`` came from (named in errors).

    Raises
    ------
    DatasetError
        A mapping key names no synthetic category, a value no real one (and is not its own key), or a
        synthetic category is neither in the real split nor mapped.
    """
    real_names = {c.name: c.id for c in real.categories}
    theirs = {c.name for dataset, _ in sets for c in dataset.categories}
    for key, value in mapping.items():
        if key not in theirs:
            raise DatasetError(
                mapping_file, key, f"names no category of the synthetic sets (theirs: {', '.join(sorted(theirs))})"
            )
        if value not in real_names and value != key:
            raise DatasetError(
                mapping_file,
                key,
                f"maps to {value!r}, which is no category of the real split (ours: {', '.join(real_names)})",
                hint="map a name to itself to add it as a new category",
            )
    categories = [category_entry(c) for c in real.categories]
    ids = dict(real_names)
    next_id = max(real_names.values(), default=0) + 1
    to_out: list[dict[int, int]] = []
    for dataset, labels in sets:
        table: dict[int, int] = {}
        for i, category in enumerate(dataset.categories):
            name = mapping.get(category.name, category.name)
            if name not in ids:
                if category.name not in mapping:
                    raise DatasetError(
                        labels,
                        f"categories[{i}].name",
                        f"category {category.name!r} is not in the real split (ours: {', '.join(real_names)})",
                        hint='give a mapping file (--mapping FILE.json: {"their name": "our name"})',
                    )
                ids[name] = next_id
                categories.append({**category_entry(category), "id": next_id})
                next_id += 1
            table[category.id] = ids[name]
        to_out.append(table)
    return categories, to_out
