"""Parse a TOML recipe into one frozen :class:`Recipe`; every key is checked, every error names its key.

A recipe is data only: TOML cannot execute code, paths are resolved against the recipe's own folder, and
the output folder is the only place a run writes to. See ``recipes/README.md`` for every key.

Layout::

    [run]                   name, seed, dataset, images, model, output, steps, guidance, attempts_per_output
    [model.prompts]         class -> text prompt, only for a user's own diffusers inpainting pipeline
    [ground.priors]         class -> real height in metres, overriding the built-in table
    [filters]               limits of the plausibility filters (names of FilterLimits' fields)
    [[stage]]               kind, class, count, and the stage's options
"""

from __future__ import annotations

import hashlib
import math
import re
import tomllib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from .errors import RecipeError

RUN_NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")


@dataclass(frozen=True)
class StageSpec:
    """One ``[[stage]]`` table: what to make and how many accepted outputs are wanted."""

    index: int
    kind: str
    target_class: str
    count: int
    options: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Recipe:
    """A validated recipe. Paths are absolute; ``sha256`` is the hash of the recipe file's bytes."""

    path: Path
    sha256: str
    name: str
    seed: int
    dataset: Path
    images: Path | None
    model: Path
    output: Path
    steps: int
    guidance: float
    attempts_per_output: int
    stages: tuple[StageSpec, ...]
    filters: Mapping[str, Any] = field(default_factory=dict)
    prompts: Mapping[str, str] = field(default_factory=dict)
    height_priors: Mapping[str, float] = field(default_factory=dict)

    def with_output(self, output: Path) -> Recipe:
        """The same recipe writing to ``output`` (the CLI's ``--out``)."""
        return replace(self, output=output.resolve())

    def with_limit(self, limit: int) -> Recipe:
        """The same recipe with each stage's wanted count capped at ``limit`` (a quick trial)."""
        stages = tuple(replace(s, count=min(s.count, limit)) for s in self.stages)
        return replace(self, stages=stages)


# --------------------------------------------------------------------------------------------------
# schema: key -> (checker, default). A checker returns the cleaned value or raises _Bad(reason).


class _Bad(ValueError):
    pass


def _integer(low: int, high: int | None = None) -> Callable[[Any], int]:
    def check(value: Any) -> int:
        if not isinstance(value, int) or isinstance(value, bool):
            raise _Bad(f"must be an integer, got {value!r}")
        if value < low or (high is not None and value > high):
            raise _Bad(f"must be in [{low}, {high if high is not None else 'inf'}], got {value}")
        return value

    return check


def _number(low: float, high: float, *, low_open: bool = False) -> Callable[[Any], float]:
    def check(value: Any) -> float:
        if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value):
            raise _Bad(f"must be a number, got {value!r}")
        if value < low or value > high or (low_open and value == low):
            bracket = "(" if low_open else "["
            raise _Bad(f"must be in {bracket}{low:g}, {high:g}], got {value:g}")
        return float(value)

    return check


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise _Bad(f"must be a non-empty string, got {value!r}")
    return value


def _name(value: Any) -> str:
    value = _text(value)
    if not RUN_NAME_PATTERN.match(value):
        raise _Bad(f"must be 1-64 letters, digits, '.', '_' or '-' starting with a letter or digit, got {value!r}")
    return value


def _boolean(value: Any) -> bool:
    if not isinstance(value, bool):
        raise _Bad(f"must be true or false, got {value!r}")
    return value


def _one_of(*choices: str) -> Callable[[Any], str]:
    def check(value: Any) -> str:
        if value not in choices:
            raise _Bad(f"must be one of {', '.join(repr(c) for c in choices)}, got {value!r}")
        return value

    return check


def _int_range(low: int, high: int) -> Callable[[Any], tuple[int, int]]:
    def check(value: Any) -> tuple[int, int]:
        if isinstance(value, int) and not isinstance(value, bool):
            value = [value, value]
        if not isinstance(value, list) or len(value) != 2:
            raise _Bad(f"must be an integer or [min, max], got {value!r}")
        lo, hi = (_integer(low, high)(v) for v in value)
        if lo > hi:
            raise _Bad(f"min must not exceed max, got [{lo}, {hi}]")
        return (lo, hi)

    return check


def _heights(value: Any) -> str | tuple[float, float]:
    if value == "real":
        return value
    if not isinstance(value, list) or len(value) != 2:
        raise _Bad(f'must be "real" or [min, max] box heights in pixels, got {value!r}')
    low, high = (_number(4.0, 10000.0)(v) for v in value)
    if low > high:
        raise _Bad(f"min must not exceed max, got [{low:g}, {high:g}]")
    return (low, high)


_RUN_KEYS: dict[str, tuple[Callable[[Any], Any], Any]] = {
    "name": (_name, None),
    "seed": (_integer(0, 2**63 - 1), 0),
    "dataset": (_text, None),
    "images": (_text, ""),
    "model": (_text, None),
    "output": (_text, None),
    "steps": (_integer(2, 100), 12),
    "guidance": (_number(1.0, 10.0), 1.0),
    "attempts_per_output": (_integer(1, 50), 4),
}

# Options of each stage kind beyond kind/class/count. Stage modules document what each one does.
STAGE_OPTIONS: dict[str, dict[str, tuple[Callable[[Any], Any], Any]]] = {
    "insert": {
        "objects_per_image": (_int_range(1, 8), (1, 1)),
        "appearance": (_one_of("exemplar", "generated"), "exemplar"),
        "harmonise": (_boolean, True),
        "max_upscale": (_number(1.0, 4.0), 1.5),
        "mirror": (_number(0.0, 1.0), 0.5),
        "hue_shift_deg": (_number(0.0, 180.0), 0.0),
        "light_match": (_number(0.0, 1.0), 1.0),
        "across_road": (_one_of("real", "anywhere"), "real"),
        "heights": (_heights, "real"),
        "mask_margin": (_number(0.0, 0.5), 0.12),
    },
    "rebackground": {
        "windows": (_integer(0, 32), 6),
        "other_objects": (_one_of("keep", "remove"), "keep"),
        "max_unlabelled_probability": (_number(0.0, 1.0), 0.5),
    },
    "restyle": {
        "condition": (_one_of("fog", "rain", "snow", "dusk", "night"), None),
        "visibility_m": (_number(10.0, 10000.0), 150.0),
        "rain_mm_per_h": (_number(0.5, 300.0), 25.0),
        "snow_intensity": (_number(0.0, 1.0), 0.5),
        "keep_invisible_as_crowd": (_boolean, False),
    },
}
STAGE_KINDS = tuple(STAGE_OPTIONS)

# Options that only some settings of a stage read: option -> (the key that decides, the values that read it).
# Giving such an option where it is not read is an error naming it; where it is not read it is not filled
# with its default either, so provenance records only the options that applied.
OPTION_APPLIES: dict[str, dict[str, tuple[str, tuple[Any, ...]]]] = {
    "restyle": {
        "visibility_m": ("condition", ("fog",)),
        "rain_mm_per_h": ("condition", ("rain",)),
        "snow_intensity": ("condition", ("snow",)),
        # only fog and snow veil objects until they are invisible
        "keep_invisible_as_crowd": ("condition", ("fog", "snow")),
    },
}


def _table(raw: Any, file: Path, key: str) -> dict:
    if not isinstance(raw, dict):
        raise RecipeError(file, key, f"must be a table, got {type(raw).__name__}")
    return raw


def _checked(
    table: Mapping[str, Any], schema: Mapping[str, tuple[Callable[[Any], Any], Any]], file: Path, prefix: str
) -> dict[str, Any]:
    unknown = sorted(set(table) - set(schema))
    if unknown:
        allowed = ", ".join(sorted(schema))
        raise RecipeError(file, f"{prefix}.{unknown[0]}", f"unknown key (allowed: {allowed})")
    out: dict[str, Any] = {}
    for key, (check, default) in schema.items():
        if key not in table:
            if default is None:
                raise RecipeError(file, f"{prefix}.{key}", "required key is missing")
            out[key] = default
            continue
        try:
            out[key] = check(table[key])
        except _Bad as bad:
            raise RecipeError(file, f"{prefix}.{key}", str(bad)) from None
    return out


def _resolve(base: Path, value: str) -> Path:
    path = Path(value).expanduser()
    return (path if path.is_absolute() else base / path).resolve()


# --------------------------------------------------------------------------------------------------


def load_recipe(path: str | Path, *, filter_fields: Mapping[str, Any] | None = None) -> Recipe:
    """Read and validate a recipe file.

    Parameters
    ----------
    path : path
        The TOML file. Relative paths inside it resolve against its folder.
    filter_fields : mapping, optional
        Allowed ``[filters]`` keys with their default values (whose types the values must match).
        Defaults to the fields of :class:`pipeline.filters.FilterLimits`.

    Raises
    ------
    RecipeError
        Naming the file, the key path (``stage[1].count``) and what is allowed.
    """
    path = Path(path).resolve()
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise RecipeError(path, "", "file not found", hint="check the path to the recipe") from None
    except OSError as exc:
        raise RecipeError(path, "", f"cannot be read ({exc})") from None
    try:
        raw = tomllib.loads(data.decode("utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise RecipeError(path, "", f"not valid TOML ({exc})") from None
    if filter_fields is None:
        filter_fields = _default_filter_fields()
    return parse_recipe(raw, path, hashlib.sha256(data).hexdigest(), filter_fields)


def parse_recipe(raw: Mapping[str, Any], path: Path, sha256: str, filter_fields: Mapping[str, Any]) -> Recipe:
    """Validate a decoded recipe (see :func:`load_recipe`)."""
    unknown = sorted(set(raw) - {"run", "model", "ground", "filters", "stage"})
    if unknown:
        raise RecipeError(path, unknown[0], "unknown table (allowed: run, model, ground, filters, stage)")
    if "run" not in raw:
        raise RecipeError(path, "run", "required table is missing")
    run = _checked(_table(raw["run"], path, "run"), _RUN_KEYS, path, "run")
    base = path.parent

    model = _table(raw.get("model", {}), path, "model")
    if set(model) - {"prompts"}:
        raise RecipeError(path, f"model.{sorted(set(model) - {'prompts'})[0]}", "unknown key (allowed: prompts)")
    prompts = _string_map(_table(model.get("prompts", {}), path, "model.prompts"), path, "model.prompts")

    ground = _table(raw.get("ground", {}), path, "ground")
    if set(ground) - {"priors"}:
        raise RecipeError(path, f"ground.{sorted(set(ground) - {'priors'})[0]}", "unknown key (allowed: priors)")
    priors = {}
    for cls, value in _table(ground.get("priors", {}), path, "ground.priors").items():
        try:
            priors[cls] = _number(0.05, 30.0, low_open=True)(value)
        except _Bad as bad:
            raise RecipeError(path, f"ground.priors.{cls}", f"real height in metres {bad}") from None

    filters = _filters(_table(raw.get("filters", {}), path, "filters"), path, filter_fields)
    stages = _stages(raw.get("stage"), path)
    dataset = _resolve(base, run["dataset"])
    images = _resolve(base, run["images"]) if run["images"] else None
    output = _resolve(base, run["output"])
    _check_output(output, [dataset, images or dataset.parent, path], path)

    return Recipe(
        path=path,
        sha256=sha256,
        name=run["name"],
        seed=run["seed"],
        dataset=dataset,
        images=images,
        model=_resolve(base, run["model"]),
        output=output,
        steps=run["steps"],
        guidance=run["guidance"],
        attempts_per_output=run["attempts_per_output"],
        stages=stages,
        filters=filters,
        prompts=prompts,
        height_priors=priors,
    )


def _check_output(output: Path, inputs: list[Path], path: Path) -> None:
    # A run writes only below its output folder; that folder must never hold the inputs it reads.
    for item in inputs:
        if item == output or item.is_relative_to(output):
            raise RecipeError(
                path, "run.output", f"{output} contains the input {item}; choose a separate output folder"
            )


def _string_map(table: Mapping[str, Any], path: Path, prefix: str) -> dict[str, str]:
    out = {}
    for key, value in table.items():
        try:
            out[key] = _text(value)
        except _Bad as bad:
            raise RecipeError(path, f"{prefix}.{key}", str(bad)) from None
    return out


def _filters(table: Mapping[str, Any], path: Path, fields: Mapping[str, Any]) -> dict[str, Any]:
    out = {}
    for key, value in table.items():
        if key not in fields:
            raise RecipeError(path, f"filters.{key}", f"unknown filter limit (allowed: {', '.join(sorted(fields))})")
        default = fields[key]
        if isinstance(default, bool):
            ok = isinstance(value, bool)
        elif isinstance(default, int):
            ok = isinstance(value, int) and not isinstance(value, bool) and value >= 0
        elif isinstance(default, float):
            ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value) and value >= 0
        else:
            ok = isinstance(value, type(default))
        if not ok:
            kind = type(default).__name__
            raise RecipeError(
                path, f"filters.{key}", f"must be a non-negative {kind} like the default {default!r}, got {value!r}"
            )
        out[key] = float(value) if isinstance(default, float) else value
    return out


def _stages(raw: Any, path: Path) -> tuple[StageSpec, ...]:
    if raw is None:
        raise RecipeError(path, "stage", "at least one [[stage]] table is required")
    if not isinstance(raw, list) or not raw:
        raise RecipeError(path, "stage", "must be one or more [[stage]] tables")
    stages = []
    for i, entry in enumerate(raw):
        where = f"stage[{i}]"
        entry = _table(entry, path, where)
        if "kind" not in entry:
            raise RecipeError(path, f"{where}.kind", f"required key is missing (one of {', '.join(STAGE_KINDS)})")
        try:
            kind = _one_of(*STAGE_KINDS)(entry["kind"])
        except _Bad as bad:
            raise RecipeError(path, f"{where}.kind", str(bad)) from None
        schema = {"kind": (_text, None), "class": (_text, None), "count": (_integer(1, 1_000_000), None)}
        schema.update(STAGE_OPTIONS[kind])
        values = _checked(entry, schema, path, where)
        options = _applied(kind, {k: values[k] for k in STAGE_OPTIONS[kind]}, set(entry), path, where)
        stages.append(StageSpec(i, kind, values["class"], values["count"], options))
    return tuple(stages)


def _applied(kind: str, options: dict[str, Any], given: set[str], path: Path, where: str) -> dict[str, Any]:
    """``options`` without those the stage's settings do not read; an error if the recipe gave one of them."""
    out = dict(options)
    for key, (decider, values) in OPTION_APPLIES.get(kind, {}).items():
        if out[decider] in values:
            continue
        if key in given:
            readers = ", ".join(repr(v) for v in values)
            raise RecipeError(
                path,
                f"{where}.{key}",
                f"does not apply to {decider} {out[decider]!r} (it is read only with {decider} {readers})",
                hint="remove the key, or change the stage's " + decider,
            )
        del out[key]
    return out


def _default_filter_fields() -> dict[str, Any]:
    from dataclasses import fields

    from .filters import FilterLimits

    defaults = FilterLimits()
    return {f.name: getattr(defaults, f.name) for f in fields(FilterLimits)}
