"""Sweep files: grid expansion order, every refused field, and the round trip."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from tui.decoding import Recipe, RecipeError
from tui.errors import UserError
from tui.sweeps.spec import DEFAULT_MODEL, SweepSpec, load_sweep, parse_sweep_text

ROOT = Path(__file__).resolve().parent.parent
PATH = Path("sweeps/x.toml")
BASE = 'prompts = ["The keeper wrote: "]\nsamples = 2\nmax_new_tokens = 8\n'


def canonical(text: str) -> str:
    return str(Recipe.parse(text))


def recipe_error(text: str) -> str:
    with pytest.raises(RecipeError) as info:
        Recipe.parse(text)
    return str(info.value)


def parse(body: str, base: str = BASE) -> SweepSpec:
    return parse_sweep_text(base + body, PATH)


def test_the_shipped_example_parses():
    spec = load_sweep(ROOT / "scenarios" / "sweep-lighthouse.toml")
    assert spec.title == "Skerrow Light logbook" and spec.model == DEFAULT_MODEL
    assert len(spec.prompts) == 3 and isinstance(spec.prompts[0], str)
    assert spec.prompts[2][0][0] == "system"
    # explicit recipes first, then 3 temperatures x 2 top_p values
    assert len(spec.recipes()) == 8 and spec.recipes()[:2] == [canonical("greedy"), canonical("temperature=1.0")]


def test_grid_expands_in_written_key_order_first_key_slowest():
    spec = parse("[grid]\ntemperature = [0.5, 0.7, 1.0]\ntop_p = [0.8, 0.95, 1.0]\n")
    # the documented order, written out by hand
    expected = [f"temperature={t} top_p={p}" for t in ("0.5", "0.7", "1.0") for p in ("0.8", "0.95", "1.0")]
    assert spec.recipes() == [canonical(t) for t in expected]
    flipped = parse("[grid]\ntop_p = [0.8, 0.95]\ntemperature = [0.5, 0.7]\n")
    assert flipped.recipes() == [canonical(f"top_p={p} temperature={t}")
                                 for p in ("0.8", "0.95") for t in ("0.5", "0.7")]


def test_explicit_recipes_come_first_and_duplicates_keep_their_first_place():
    spec = parse('recipes = ["temperature=0.7 top_p=0.9", "greedy", "temperature=0"]\n'
                 "[grid]\ntemperature = [0.5, 0.7]\ntop_p = [0.9]\n")
    # temperature=0 is greedy (canonical), and the grid's 0.7/0.9 repeats recipe 1
    assert spec.recipes() == [canonical("temperature=0.7 top_p=0.9"), "greedy",
                              canonical("temperature=0.5 top_p=0.9")]


def test_grid_values_true_false_strings_and_full_stages():
    spec = parse('[grid]\nrepetition_penalty = [false, 1.3]\ngreedy = [true]\n')
    assert spec.recipes() == ["greedy", canonical("repetition_penalty=1.3 greedy")]
    spec = parse('[grid]\nmirostat = [5, "(tau=3,learning_rate=0.2)"]\n')
    assert spec.recipes() == [canonical("mirostat(tau=5)"), canonical("mirostat(tau=3,learning_rate=0.2)")]
    # leaving every stage out is the empty recipe, the model's own distribution
    assert parse("[grid]\ntop_p = [false, 0.9]\n").recipes() == [canonical(""), canonical("top_p=0.9")]


def test_defaults():
    spec = parse('recipes = ["greedy"]\n')
    assert (spec.model, spec.seed, spec.chunk_rows, spec.stop, spec.title) == (DEFAULT_MODEL, 0, 32, (), "x")
    assert spec.scenario is None and spec.prompts == ("The keeper wrote: ",)


def test_scenario_path_is_resolved_against_the_sweep_file():
    spec = parse_sweep_text('scenario = "../scenarios/tea.toml"\nrecipes = ["greedy"]\n'
                            "samples = 1\nmax_new_tokens = 4\n", Path("sweeps/x.toml"))
    assert spec.scenario == Path("scenarios/tea.toml") and spec.prompts == ()


BAD = [
    # (body after BASE, field, reason); positions count from 1
    ('[grid]\ntop_p = [0.8, 1.5]\n', "grid.top_p[2]", recipe_error("top_p=1.5")),
    ('[grid]\ntopp = [0.9]\n', "grid.topp[1]", recipe_error("topp=0.9")),
    ('[grid]\ntop_p = 0.9\n', "grid.top_p", "must be a non-empty list of values, got 0.9"),
    ('[grid]\ntop_p = []\n', "grid.top_p", "must be a non-empty list of values, got []"),
    ('[grid]\ntop_p = [inf]\n', "grid.top_p[1]", "must be a finite number, got inf"),
    ('[grid]\ntop_p = [[0.9]]\n', "grid.top_p[1]", "must be a number, a string, true or false, got [0.9]"),
    ('[grid]\ntop_p = [true]\n', "grid.top_p[1]", recipe_error("top_p")),
    ('[grid]\n', "grid", "must be a table of stage = [values], got {}"),
    ('grid = [1]\n', "grid", "must be a table of stage = [values], got [1]"),
    ('recipes = ["greedy", "top_k=4.5"]\n', "recipes[2]", recipe_error("top_k=4.5")),
    ('recipes = [3]\n', "recipes[1]", "must be a recipe text, got 3"),
    ('recipes = "greedy"\n', "recipes", "must be a list of recipe texts, got 'greedy'"),
    ('seed = -1\nrecipes = ["greedy"]\n', "seed", "must be an integer in [0, 9223372036854775807], got -1"),
    ('chunk_rows = 0\nrecipes = ["greedy"]\n', "chunk_rows", "must be an integer in [1, 256], got 0"),
    ('chunk_rows = 257\nrecipes = ["greedy"]\n', "chunk_rows", "must be an integer in [1, 256], got 257"),
    ('stop = ["", "x"]\nrecipes = ["greedy"]\n', "stop", "must be a list of non-empty strings, got ['', 'x']"),
    ('model = ""\nrecipes = ["greedy"]\n', "model", "must be a non-empty string, got ''"),
    ('title = 4\nrecipes = ["greedy"]\n', "title", "must be a non-empty string, got 4"),
    ('sampels = 3\nrecipes = ["greedy"]\n', "sampels",
     "unknown field (known: title, model, prompts, scenario, recipes, grid, samples, "
     "max_new_tokens, seed, chunk_rows, stop)"),
    ('', "recipes", "no recipe: give `recipes`, a [grid] table, or both"),
    ('[grid]\ntemperature = [' + ", ".join(str(0.1 * k + 0.1) for k in range(17)) + ']\n'
     'top_k = [' + ", ".join(str(k + 1) for k in range(16)) + ']\n',
     "grid", "272 combinations, at most 256"),
]


@pytest.mark.parametrize(("body", "field", "reason"), BAD, ids=[b[1] for b in BAD])
def test_every_bad_field_names_file_field_and_reason(body, field, reason):
    with pytest.raises(UserError) as info:
        parse(body)
    assert str(info.value) == f"{PATH}: {field}: {reason}"


BAD_TOP = [
    ('prompts = ["a"]\nsamples = 0\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "samples", "must be an integer in [1, 100000], got 0"),
    ('prompts = ["a"]\nsamples = true\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "samples", "must be an integer in [1, 100000], got True"),
    ('prompts = ["a"]\nsamples = 1_000_000_000_000_000_000_000_000_000_000\nmax_new_tokens = 8\n'
     'recipes = ["greedy"]\n',
     "samples", "must be an integer in [1, 100000], got 1000000000000000000000000000000"),
    ('prompts = ["a"]\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "samples", "missing (samples per prompt and recipe, 1..100000)"),
    ('prompts = ["a"]\nsamples = 1\nmax_new_tokens = 4097\nrecipes = ["greedy"]\n',
     "max_new_tokens", "must be an integer in [1, 4096], got 4097"),
    ('prompts = ["a"]\nsamples = 1\nrecipes = ["greedy"]\n', "max_new_tokens", "missing (1..4096)"),
    ('samples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts", "give exactly one of `prompts` or `scenario`"),
    ('prompts = ["a"]\nscenario = "s.toml"\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts", "give exactly one of `prompts` or `scenario`"),
    ('prompts = []\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts", "must be a non-empty list of prompts, got []"),
    ('prompts = ["a", "  "]\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts[2]", "must be a non-empty string, got '  '"),
    ('prompts = [7]\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts[1]", "must be a non-empty string or a non-empty list of { role, content } tables, got 7"),
    ('prompts = [[{ role = "bot", content = "hi" }]]\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts[1][1].role", "must be one of system, user, assistant, got 'bot'"),
    ('prompts = [[{ role = "user", content = "hi" }, { role = "user" }]]\nsamples = 1\n'
     'max_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts[1][2]", "must be a table with `role` and `content` only, got {'role': 'user'}"),
    ('prompts = [[{ role = "user", content = "" }]]\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "prompts[1][1].content", "must be a non-empty string, got ''"),
    ('scenario = 5\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\n',
     "scenario", "must be a non-empty string, got 5"),
    ('prompts = ["a"]\nsamples = 1\nmax_new_tokens = 8\nrecipes = ["greedy"]\nfoo = 1\nbar = 2\n',
     "foo, bar", "unknown fields (known: title, model, prompts, scenario, recipes, grid, samples, "
                 "max_new_tokens, seed, chunk_rows, stop)"),
]


@pytest.mark.parametrize(("text", "field", "reason"), BAD_TOP, ids=[b[1] for b in BAD_TOP])
def test_bad_top_level_fields(text, field, reason):
    with pytest.raises(UserError) as info:
        parse_sweep_text(text, PATH)
    assert str(info.value) == f"{PATH}: {field}: {reason}"


def test_toml_syntax_error_names_the_line():
    text = 'prompts = ["a"]\nsamples = 2\nmax_new_tokens 8\n'
    with pytest.raises(tomllib.TOMLDecodeError) as ref:  # reference: Python 3.11 tomllib
        tomllib.loads(text)
    with pytest.raises(UserError) as info:
        parse_sweep_text(text, PATH)
    assert str(info.value).startswith(f"{PATH}: line 3: ")
    assert str(ref.value).split(" (at line")[0] in str(info.value)


def test_missing_file_is_one_line(tmp_path):
    with pytest.raises(UserError, match=r"nope\.toml: no such file"):
        load_sweep(tmp_path / "nope.toml")


ROUND_TRIP = (
    'title = "Quotes \\" and \\\\ back, tab\\t, DEL \\u007f, é"\n'
    'model = "some/local/folder"\n'
    'prompts = ["line one\\nline two", [{ role = "system", content = "Be brief." }, '
    '{ role = "user", content = "Log the tide." }]]\n'
    'recipes = ["top_p=0.9,temperature=0.7", "mirostat=4"]\n'
    'samples = 3\nmax_new_tokens = 20\nseed = 99\nchunk_rows = 5\nstop = ["\\n\\n", "END"]\n'
    '[grid]\nrepetition_penalty = [false, 1.2]\nepsilon = [1e-05, 0.0003]\n'
    'mirostat = ["(tau=3,learning_rate=0.2)"]\n'
)


def test_round_trip_through_normalised_toml(tmp_path):
    spec = parse_sweep_text(ROUND_TRIP, PATH)
    again = parse_sweep_text(spec.to_toml_text(), PATH)
    assert again == spec and again.fingerprint() == spec.fingerprint()
    assert spec.source_text == ROUND_TRIP  # the original text is kept for the output folder
    # through a real file too, with a scenario path relative to the sweep file
    (tmp_path / "sub").mkdir()
    path = tmp_path / "sub" / "s.toml"
    path.write_text('scenario = "../tea.toml"\nrecipes = ["greedy"]\nsamples = 1\n'
                    "max_new_tokens = 4\n", encoding="utf-8")
    spec = load_sweep(path)
    path.write_text(spec.to_toml_text(), encoding="utf-8")
    assert load_sweep(path) == spec and spec.scenario == tmp_path / "tea.toml"


def test_fingerprint_follows_what_changes_the_tokens():
    spec = parse('recipes = ["greedy"]\n')
    assert len(spec.fingerprint()) == 64 and spec.fingerprint() == parse('recipes = ["greedy"]\n').fingerprint()
    assert parse('title = "Other"\nrecipes = ["greedy"]\n').fingerprint() == spec.fingerprint()
    assert parse('recipes = ["temperature=0"]\n').fingerprint() == spec.fingerprint()  # same canonical
    assert parse("[grid]\ngreedy = [true]\n").fingerprint() == spec.fingerprint()
    for change in ('seed = 1\nrecipes = ["greedy"]\n', 'recipes = ["greedy", "top_k=5"]\n',
                   'chunk_rows = 8\nrecipes = ["greedy"]\n', 'stop = ["."]\nrecipes = ["greedy"]\n'):
        assert parse(change).fingerprint() != spec.fingerprint(), change
    assert parse_sweep_text(BASE.replace("2", "3") + 'recipes = ["greedy"]\n',
                            PATH).fingerprint() != spec.fingerprint()


@pytest.mark.parametrize("name, make, reason", [
    ("bad.toml", lambda p: p.mkdir(), "is a folder, not a sweep file"),
    ("bad.toml", lambda p: p.write_bytes(b"title = \"\xff\"\n"), "not UTF-8 text"),
    ("plain/bad.toml", lambda p: p.parent.write_text("a file, not a folder"), "cannot be read"),
])
def test_an_unreadable_sweep_or_scenario_file_is_one_line(tmp_path, name, make, reason):
    from tui.session.scenario import load_scenario

    path = tmp_path / name
    make(path)
    with pytest.raises(UserError, match=f"bad\\.toml: {reason}"):
        load_sweep(path)
    with pytest.raises(UserError, match=f"bad\\.toml: {reason.replace('sweep', 'scenario')}"):
        load_scenario(path)
