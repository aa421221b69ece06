"""Recipe parsing: one test per rule, every error names the key path and what is allowed."""

from __future__ import annotations

from pathlib import Path

import pytest

from pipeline.errors import RecipeError
from pipeline.plan import derive_seed, make_plan
from pipeline.recipe import load_recipe

GOOD = """
[run]
name = "more-tractors"
seed = 7
dataset = "data/train.json"
model = "models/default"
output = "out/more-tractors"

[filters]
max_iou = 0.05

[ground.priors]
tractor = 2.8

[[stage]]
kind = "insert"
class = "tractor"
count = 20
objects_per_image = [1, 2]
"""

FILTER_FIELDS = {"max_iou": 0.1, "max_objects": 12, "min_surface_share": 0.8}


def _load(tmp_path: Path, text: str):
    path = tmp_path / "recipe.toml"
    path.write_text(text)
    return load_recipe(path, filter_fields=FILTER_FIELDS)


def test_good_recipe(tmp_path):
    recipe = _load(tmp_path, GOOD)
    assert recipe.name == "more-tractors" and recipe.seed == 7
    assert recipe.dataset == tmp_path / "data" / "train.json"  # relative to the recipe's folder
    assert recipe.output == tmp_path / "out" / "more-tractors"
    assert recipe.filters == {"max_iou": 0.05}
    assert recipe.height_priors == {"tractor": 2.8}
    (stage,) = recipe.stages
    assert (stage.kind, stage.target_class, stage.count) == ("insert", "tractor", 20)
    assert stage.options == {
        "objects_per_image": (1, 2),
        "appearance": "exemplar",
        "harmonise": True,
        "max_upscale": 1.5,
        "mirror": 0.5,
        "hue_shift_deg": 0.0,
        "light_match": 1.0,
        "across_road": "real",
        "heights": "real",
        "mask_margin": 0.12,
    }
    assert recipe.steps == 12 and recipe.attempts_per_output == 4  # defaults filled
    assert len(recipe.sha256) == 64


def test_limit_and_output_overrides(tmp_path):
    recipe = _load(tmp_path, GOOD)
    assert recipe.with_limit(3).stages[0].count == 3
    assert recipe.with_output(tmp_path / "x").output == tmp_path / "x"


RULES = [
    ("unknown table", GOOD + "\n[extra]\na = 1\n", "extra", "unknown table"),
    ("unknown run key", GOOD.replace("seed = 7", 'seed = 7\ncolour = "red"'), "run.colour", "unknown key"),
    ("missing name", GOOD.replace('name = "more-tractors"\n', ""), "run.name", "required key is missing"),
    ("bad name", GOOD.replace('"more-tractors"', '"../evil"'), "run.name", "letters, digits"),
    ("seed a string", GOOD.replace("seed = 7", 'seed = "7"'), "run.seed", "must be an integer"),
    ("seed negative", GOOD.replace("seed = 7", "seed = -1"), "run.seed", "must be in [0,"),
    ("steps too few", GOOD.replace("seed = 7", "seed = 7\nsteps = 1"), "run.steps", "must be in [2, 100]"),
    ("guidance below 1", GOOD.replace("seed = 7", "seed = 7\nguidance = 0.5"), "run.guidance", "[1, 10]"),
    ("no stage", GOOD.split("[[stage]]")[0], "stage", "at least one [[stage]]"),
    ("unknown kind", GOOD.replace('kind = "insert"', 'kind = "paste"'), "stage[0].kind", "must be one of"),
    ("count zero", GOOD.replace("count = 20", "count = 0"), "stage[0].count", "must be in [1,"),
    ("class missing", GOOD.replace('class = "tractor"\n', ""), "stage[0].class", "required key is missing"),
    ("bad range", GOOD.replace("[1, 2]", "[3, 2]"), "stage[0].objects_per_image", "min must not exceed max"),
    ("unknown stage key", GOOD + "speed = 3\n", "stage[0].speed", "unknown key (allowed:"),
    ("unknown filter", GOOD.replace("max_iou = 0.05", "max_fun = 1"), "filters.max_fun", "unknown filter limit"),
    ("filter type", GOOD.replace("max_iou = 0.05", 'max_iou = "low"'), "filters.max_iou", "non-negative float"),
    ("filter int", GOOD.replace("max_iou = 0.05", "max_objects = 2.5"), "filters.max_objects", "non-negative int"),
    ("prior zero", GOOD.replace("tractor = 2.8", "tractor = 0"), "ground.priors.tractor", "real height"),
    ("output holds input", GOOD.replace('"out/more-tractors"', '"data"'), "run.output", "contains the input"),
    ("bad toml", "[run\nname=1", "", "not valid TOML"),
]


@pytest.mark.parametrize("label, text, key, words", RULES, ids=[r[0] for r in RULES])
def test_each_rule_names_the_key(tmp_path, label, text, key, words):
    with pytest.raises(RecipeError) as info:
        _load(tmp_path, text)
    path = tmp_path / "recipe.toml"
    expected_start = f"{path}: {key}: " if key else f"{path}: "
    assert str(info.value).startswith(expected_start), str(info.value)
    assert words in str(info.value)


def test_missing_file(tmp_path):
    with pytest.raises(RecipeError, match="file not found"):
        load_recipe(tmp_path / "none.toml", filter_fields=FILTER_FIELDS)


def test_recipe_cannot_run_code(tmp_path):
    # TOML has no expressions: a value that looks like code stays a string and then fails its type check.
    text = GOOD.replace("count = 20", "count = \"__import__('os').system('true')\"")
    with pytest.raises(RecipeError, match=r"stage\[0\].count: must be an integer"):
        _load(tmp_path, text)


def test_plan_is_deterministic_and_jobs_reproduce_alone(tmp_path):
    recipe = _load(tmp_path, GOOD)
    sources = [[(i, -1) for i in range(7)]]
    first = make_plan(recipe, sources)
    again = make_plan(recipe, sources)
    assert first == again
    assert len(first.jobs) == 20 and [len(c) for c in first.chunks] == [8, 8, 4]
    job = first.jobs[13]
    assert job.seed == derive_seed(7, 0, 13)  # from (recipe seed, stage, slot) alone
    assert job.attempt_seed(1) != job.attempt_seed(0)
    # attempts of one job start from different scenes where there are several
    assert len({s for s, _ in job.sources}) > 1
    # a different seed deals the sources differently
    other = make_plan(_load(tmp_path, GOOD.replace("seed = 7", "seed = 8")), sources)
    assert [j.sources for j in other.jobs] != [j.sources for j in first.jobs]


def test_shards_partition_the_chunks(tmp_path):
    plan = make_plan(_load(tmp_path, GOOD.replace("count = 20", "count = 50")), [[(0, -1)]])
    shards = [plan.shard(i, 3) for i in range(3)]
    assert sorted(c for s in shards for c in s) == list(range(len(plan.chunks)))
    with pytest.raises(Exception, match="0 <= i < N"):
        plan.shard(3, 3)


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ('appearance = "drawn"', "must be one of 'exemplar', 'generated'"),
        ("max_upscale = 0.5", "must be in [1, 4]"),
        ("mirror = 1.5", "must be in [0, 1]"),
        ("heights = [40, 20]", "min must not exceed max"),
        ('heights = "test"', 'must be "real" or [min, max]'),
        ("harmonise = 1", "must be true or false"),
    ],
)
def test_bad_insert_options_name_their_key(tmp_path, line, message):
    with pytest.raises(RecipeError) as info:
        _load(tmp_path, GOOD.replace("objects_per_image = [1, 2]", "objects_per_image = [1, 2]\n" + line))
    assert line.split(" = ")[0] in str(info.value) and message in str(info.value)


def test_insert_height_range_is_read(tmp_path):
    recipe = _load(
        tmp_path, GOOD.replace("objects_per_image = [1, 2]", "objects_per_image = [1, 2]\nheights = [16, 80]")
    )
    assert recipe.stages[0].options["heights"] == (16.0, 80.0)


def test_the_probe_arm_recipes_are_one_plan():
    # The probe compares arms; only what an arm tests may differ between them (issue: copy-paste control).
    recipes = {p.stem: load_recipe(p) for p in sorted((Path(__file__).parents[1] / "recipes").glob("probe-*.toml"))}
    assert set(recipes) == {"probe-paste", "probe-exemplar", "probe-exemplar-unfiltered", "probe-generated"}
    tested = {"appearance", "harmonise", "light_match"}  # how the object is made; placements stay the same

    def plan_of(recipe):
        stages = [(s.kind, s.target_class, s.count, {k: v for k, v in s.options.items() if k not in tested})
                  for s in recipe.stages]  # fmt: skip
        return recipe.seed, recipe.dataset, recipe.attempts_per_output, stages

    plans = {name: plan_of(r) for name, r in recipes.items()}
    assert len({repr(p) for p in plans.values()}) == 1, plans
    assert recipes["probe-paste"].stages[0].options["harmonise"] is False
    assert recipes["probe-generated"].stages[0].options["appearance"] == "generated"
    assert recipes["probe-exemplar"].filters == {} and recipes["probe-exemplar-unfiltered"].filters
