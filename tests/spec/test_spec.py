"""Tests of spec files (rungway.scheduler.spec) and objective loading (rungway.workers.objective).

The broken-spec corpus lives in ``broken/*.toml``: each file starts with
``# expect: <part of the message>``, ``# field: <dotted field or ->`` and, where the line is
known, ``# line: <n>``.
"""

from __future__ import annotations

import ast
import math
import pickle
import re
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.plan import MODES, SearchPlan
from rungway.scheduler.core.samplers import EvolutionSampler, GridSampler, RandomSampler, SobolSampler
from rungway.scheduler.core.space import SearchSpace
from rungway.scheduler.spec import (
    SearchSpec,
    SpecFileError,
    check_spec,
    load_spec,
    parse_duration,
    parse_spec,
)
from rungway.workers import Objective, interpret_result, load_objective
from rungway.workers.objective import NOT_FINITE

HERE = Path(__file__).resolve().parent
REPO = HERE.parents[1]
BROKEN = sorted((HERE / "broken").glob("*.toml"))

FULL = """\
name = "digits-mlp"
objective = "objectives_for_tests:resumable"
metric = "accuracy"
better = "higher"
seed = 7

[ladder]
unit = "epochs"
min = 1
max = 27
eta = 3
mode = "sync-halving"
early_stopping_rate = 1
sync_trials = 12

[sampler]
kind = "evolution"
population = 8
sample_size = 3

[limits]
trials = 12
cpu_hours = 2.0
deadline = "1h30m"
max_crashes = 1
hang_timeout = "10m"

[resources]
cpus = 0.5
memory_mb = 2048

[space.learning_rate]
kind = "real"
lower = 1e-4
upper = 0.3
scale = "log"

[space.optimizer]
kind = "category"
options = ["sgd", "adam"]
"""

MINIMAL = """\
name = "tiny"
objective = "objectives_for_tests:plain"
metric = "loss"
better = "lower"

[ladder]
min = 1
max = 9

[space.lr]
kind = "real"
lower = 0.001
upper = 0.1
"""


def with_ladder(extra: str, base: str = MINIMAL) -> str:
    return base.replace("max = 9\n", f"max = 9\n{extra}\n")


def header(path: Path) -> dict[str, str]:
    found = {}
    for line in path.read_text().splitlines():
        m = re.match(r"^# (expect|field|line): (.*)$", line)
        if not m:
            break
        found[m.group(1)] = m.group(2)
    return found


# --------------------------------------------------------------------------------------------
# The broken corpus
# --------------------------------------------------------------------------------------------


def test_the_broken_corpus_covers_what_it_must() -> None:
    names = {p.stem for p in BROKEN}
    required = {
        "missing_name", "missing_objective", "bad_name_characters", "eta_wrong_type", "eta_one",
        "min_above_max", "unknown_top_level_key", "unknown_mode", "unknown_sampler_kind",
        "bad_sampler_option_value", "unknown_parameter_kind", "parameter_lower_not_below_upper",
        "bad_deadline", "negative_cpus", "toml_syntax_error", "objective_without_colon",
        "objective_module_missing", "objective_attribute_missing", "objective_three_parameters",
        "stopping_with_plain_objective",
    }
    assert required <= names
    for path in BROKEN:
        assert {"expect", "field"} <= header(path).keys(), path.name


@pytest.mark.parametrize("path", BROKEN, ids=lambda p: p.stem)
def test_each_broken_spec_fails_with_its_expected_message(path: Path) -> None:
    head = header(path)
    with pytest.raises(SpecFileError) as info:
        check_spec(load_spec(path))
    err = info.value
    text = str(err)
    assert head["expect"] in text
    assert path.name in text
    assert text.startswith(str(path))
    field = None if head["field"] == "-" else head["field"]
    assert err.field == field
    if field is not None:
        assert f": {field}: " in text.splitlines()[0]
    if "line" in head:
        assert err.line == int(head["line"])
        assert text.startswith(f"{path}:{head['line']}: ")
    else:
        assert err.line is None
        assert text.startswith(f"{path}: ")
    assert isinstance(err, SpecError) and isinstance(err, ValueError)


def test_a_toml_syntax_error_gives_the_line_tomllib_reports() -> None:
    text = MINIMAL.replace("max = 9", "max = = 9")
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "s.toml")
    assert info.value.line == 8
    assert str(info.value).startswith("s.toml:8: not valid TOML: ")
    assert "column" in str(info.value)


def test_every_mistake_is_reported_each_on_its_own_line() -> None:
    text = with_ladder("eta = 1").replace('name = "tiny"', 'name = "a b"').replace("upper = 0.1", "upper = 0.0001")
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "many.toml")
    lines = str(info.value).splitlines()
    assert lines[0] == (
        "many.toml:1: name: must be 1 to 64 characters: a letter or digit, then letters, "
        "digits, '.', '_' or '-' (got \"a b\"), e.g. name = \"digits-mlp\""
    )
    assert lines[1] == "many.toml:9: ladder.eta: must be an integer >= 2 (got 1)"
    assert [p.field for p in info.value.problems] == ["name", "ladder.eta"]
    # The space is only looked at once the fields themselves are valid.
    fixed = text.replace('name = "a b"', 'name = "ab"').replace("eta = 1", "eta = 3")
    with pytest.raises(SpecFileError) as info:
        parse_spec(fixed, "many.toml")
    assert info.value.field == "space.lr.lower" and info.value.line == 13


def test_plan_and_space_problems_are_reported_together() -> None:
    text = with_ladder("early_stopping_rate = 5").replace('kind = "real"', 'kind = "reel"')
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "both.toml")
    fields = [p.field for p in info.value.problems]
    assert fields == ["ladder.early_stopping_rate", "space.lr.kind"]
    assert str(info.value).splitlines()[1].startswith("both.toml:12: space.lr.kind: ")


def test_unknown_keys_in_a_parameter_are_located() -> None:
    text = MINIMAL.replace("upper = 0.1", "upper = 0.1\nscael = \"log\"")
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "p.toml")
    assert info.value.field == "space.lr.scael"
    assert info.value.line == 14


def test_a_quoted_table_header_is_located() -> None:
    text = MINIMAL.replace("[space.lr]", '[space."lr"]').replace("lower = 0.001", "lower = 5.0")
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "q.toml")
    assert (info.value.field, info.value.line) == ("space.lr.lower", 12)


def test_a_key_inside_a_multiline_string_is_not_mistaken_for_the_field() -> None:
    text = 'metric = """\neta = 1\n"""\n' + MINIMAL.replace('metric = "loss"\n', "")
    text = with_ladder("eta = 1", text)
    with pytest.raises(SpecFileError) as info:
        parse_spec(text, "m.toml")
    # the metric is refused (it has spaces), and ladder.eta is found on its real line
    assert [p.field for p in info.value.problems] == ["metric", "ladder.eta"]
    assert [p.line for p in info.value.problems] == [1, 11]


def test_a_missing_file_and_non_utf8_text_are_spec_file_errors(tmp_path: Path) -> None:
    with pytest.raises(SpecFileError, match=r"nope\.toml: cannot read the spec file"):
        load_spec(tmp_path / "nope.toml")
    bad = tmp_path / "latin1.toml"
    bad.write_bytes(b'name = "ok"\nmetric = "caf\xe9"\n')
    with pytest.raises(SpecFileError) as info:
        load_spec(bad)
    assert info.value.line == 2
    assert "not UTF-8" in str(info.value)


# --------------------------------------------------------------------------------------------
# A valid spec
# --------------------------------------------------------------------------------------------


def test_a_full_spec_loads_with_every_field(tmp_path: Path) -> None:
    path = tmp_path / "digits.toml"
    path.write_text(FULL)
    spec = load_spec(path)
    assert spec.name == "digits-mlp"
    assert spec.source == str(path)
    assert spec.text == FULL
    assert spec.maximize is True
    assert spec.seed == 7
    assert spec.ladder.unit == "epochs"
    assert spec.deadline_seconds == 5400.0
    assert spec.hang_timeout_seconds == 600.0
    assert spec.limits.cpu_hours == 2.0
    assert spec.resources.cpus == 0.5 and spec.resources.memory_mb == 2048
    assert spec.plan() == SearchPlan(
        mode="sync-halving",
        min_budget=1,
        max_budget=27,
        eta=3,
        early_stopping_rate=1,
        maximize=True,
        max_trials=12,
        max_crashes=1,
        sync_trials=12,
        iterations=1,
        hyperband_counts="formula",
    )
    assert spec.plan().brackets()[0].counts == (12, 4, 1)
    assert spec.space() == SearchSpace.from_mapping(
        {
            "learning_rate": {"kind": "real", "lower": 1e-4, "upper": 0.3, "scale": "log"},
            "optimizer": {"kind": "category", "options": ["sgd", "adam"]},
        }
    )
    sampler = spec.make_sampler(np.random.default_rng(0))
    assert isinstance(sampler, EvolutionSampler)
    assert (sampler.population, sampler.sample_size) == (8, 3)
    assert sampler.rung == 1  # the level of the ladder's bottom rung (early_stopping_rate 1)
    assert spec.space().is_valid(sampler.propose())
    assert check_spec(spec) == []


def test_the_same_seed_gives_the_same_proposals() -> None:
    spec = parse_spec(FULL)
    a = spec.make_sampler(np.random.default_rng(spec.seed))
    b = spec.make_sampler(np.random.default_rng(spec.seed))
    assert [a.propose() for _ in range(5)] == [b.propose() for _ in range(5)]


def test_defaults_of_a_minimal_spec() -> None:
    spec = parse_spec(MINIMAL)
    assert spec.source == "<spec>"
    assert spec.plan() == SearchPlan(mode="asha", min_budget=1, max_budget=9, eta=3, maximize=False)
    assert spec.ladder.unit == "budget"
    assert spec.seed == 0
    assert spec.sampler.kind == "random" and spec.sampler.options == {}
    assert spec.limits.max_crashes == 2
    assert spec.deadline_seconds is None and spec.hang_timeout_seconds is None
    assert spec.limits.trials is None and spec.limits.cpu_hours is None
    assert spec.resources.cpus == 1 and spec.resources.memory_mb == 0
    assert isinstance(spec.make_sampler(np.random.default_rng(1)), RandomSampler)


MODE_CASES = [
    ('mode = "asha"', SearchPlan(mode="asha", min_budget=1, max_budget=9)),
    (
        'mode = "asha-stopping"\nearly_stopping_rate = 1',
        SearchPlan(mode="asha-stopping", min_budget=1, max_budget=9, early_stopping_rate=1),
    ),
    ('mode = "sync-halving"', SearchPlan(mode="sync-halving", min_budget=1, max_budget=9)),
    ('mode = "hyperband"', SearchPlan(mode="hyperband", min_budget=1, max_budget=9)),
    (
        'mode = "sync-hyperband"\niterations = 2\nhyperband_counts = "table"',
        SearchPlan(
            mode="sync-hyperband", min_budget=1, max_budget=9, iterations=2, hyperband_counts="table"
        ),
    ),
    ('mode = "full-budget"', SearchPlan(mode="full-budget", min_budget=1, max_budget=9)),
]


@pytest.mark.parametrize(("extra", "plan"), MODE_CASES, ids=[p.mode for _, p in MODE_CASES])
def test_every_mode_maps_to_its_plan(extra: str, plan: SearchPlan) -> None:
    assert parse_spec(with_ladder(extra)).plan() == plan


def test_the_mode_cases_cover_every_mode() -> None:
    assert sorted(p.mode for _, p in MODE_CASES) == sorted(MODES)


def test_float_budgets_stay_floats() -> None:
    spec = parse_spec(MINIMAL.replace("min = 1", "min = 0.1").replace("max = 9", "max = 0.9"))
    assert spec.plan().brackets()[0].ladder.budgets == (0.1, 0.3, 0.9)


@pytest.mark.parametrize(
    ("mode", "rung"),
    [("asha", 0), ("hyperband", 0), ("full-budget", 2), ("sync-hyperband", 0)],
)
def test_evolution_learns_at_the_first_brackets_bottom_level_by_default(mode: str, rung: int) -> None:
    text = with_ladder(f'mode = "{mode}"') + '\n[sampler]\nkind = "evolution"\n'
    sampler = parse_spec(text).make_sampler(np.random.default_rng(0))
    assert isinstance(sampler, EvolutionSampler)
    assert sampler.rung == rung


def test_an_explicit_evolution_rung_is_kept() -> None:
    text = with_ladder('mode = "full-budget"') + '\n[sampler]\nkind = "evolution"\nrung = 1\n'
    spec = parse_spec(text)
    assert spec.make_sampler(np.random.default_rng(0)).rung == 1
    assert spec.sampler.options == {"rung": 1}


@pytest.mark.parametrize(
    ("table", "cls"),
    [('kind = "grid"\npoints_per_axis = 3', GridSampler), ('kind = "sobol"', SobolSampler)],
)
def test_other_sampler_kinds_are_built(table: str, cls: type) -> None:
    spec = parse_spec(MINIMAL + f"\n[sampler]\n{table}\n")
    assert isinstance(spec.make_sampler(np.random.default_rng(0)), cls)


def test_a_spec_file_error_survives_pickling() -> None:
    with pytest.raises(SpecFileError) as info:
        parse_spec(with_ladder("eta = 1"), "p.toml")
    copy = pickle.loads(pickle.dumps(info.value))
    assert str(copy) == str(info.value) == "p.toml:9: ladder.eta: must be an integer >= 2 (got 1)"
    assert (copy.field, copy.line, copy.source, copy.problems) == (
        "ladder.eta", 9, "p.toml", info.value.problems
    )


def test_a_spec_is_frozen() -> None:
    spec = parse_spec(MINIMAL)
    with pytest.raises(ValueError):
        spec.name = "other"  # type: ignore[misc]


def test_the_documented_example_is_a_valid_spec() -> None:
    doc = (REPO / "docs" / "spec-files.md").read_text()
    blocks = re.findall(r"```toml\n(.*?)```", doc, flags=re.S)
    full = [b for b in blocks if b.lstrip().startswith("name =") and "[space." in b]
    assert full, "docs/spec-files.md has no full example"
    spec = parse_spec(full[0], "docs/spec-files.md")
    assert spec.name == "digits-mlp"
    assert spec.plan().mode == "asha"
    assert spec.deadline_seconds == 30 * 60
    # and the documented error line is what the loader writes for that mistake
    broken = full[0].replace("eta = 3", "eta = 1")
    with pytest.raises(SpecFileError) as info:
        parse_spec(broken, "digits.toml")
    line = next(i for i, l in enumerate(broken.splitlines(), 1) if l.startswith("eta = 1"))
    expected = f"digits.toml:{line}: ladder.eta: must be an integer >= 2 (got 1)"
    assert str(info.value) == expected
    assert expected in doc


# --------------------------------------------------------------------------------------------
# Durations
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "seconds"),
    [("90s", 90.0), ("30m", 1800.0), ("2h", 7200.0), ("1h30m", 5400.0), ("1d", 86400.0),
     ("1h0m30s", 3630.0), ("1.5h", 5400.0), (45, 45.0), (0.5, 0.5), (" 10m ", 600.0)],
)
def test_durations(value: object, seconds: float) -> None:
    assert parse_duration(value) == seconds


@pytest.mark.parametrize("value", ["", "h", "30", "30min", "1m1h", "-5s", "0s", 0, -3, True, float("inf"), "1h 30 m x"])
def test_bad_durations(value: object) -> None:
    with pytest.raises(SpecError, match="must be a duration > 0"):
        parse_duration(value)


# --------------------------------------------------------------------------------------------
# check_spec
# --------------------------------------------------------------------------------------------


def test_check_spec_notes_that_a_plain_objective_restarts_when_promoted() -> None:
    notes = check_spec(parse_spec(MINIMAL))
    assert len(notes) == 1
    assert notes[0].startswith("objective: 'objectives_for_tests:plain' takes (config, budget)")


def test_check_spec_has_nothing_to_say_about_a_plain_full_budget_search() -> None:
    assert check_spec(parse_spec(with_ladder('mode = "full-budget"'))) == []


def test_check_spec_accepts_a_resumable_objective_for_the_stopping_form() -> None:
    text = with_ladder('mode = "asha-stopping"').replace(":plain", ":resumable")
    assert check_spec(parse_spec(text)) == []


def test_check_spec_errors_name_the_objective_line() -> None:
    text = MINIMAL.replace(":plain", ":three")
    with pytest.raises(SpecFileError) as info:
        check_spec(parse_spec(text, "t.toml"))
    assert info.value.line == 2 and info.value.field == "objective"
    assert str(info.value).startswith("t.toml:2: objective: 'objectives_for_tests:three' takes 3")


# --------------------------------------------------------------------------------------------
# load_objective
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "form"),
    [("plain", "plain"), ("plain_with_default", "plain"), ("resumable", "resumable"),
     ("resumable_with_options", "resumable"), ("callable_object", "plain")],
)
def test_objective_forms(name: str, form: str) -> None:
    objective = load_objective(f"objectives_for_tests:{name}")
    assert isinstance(objective, Objective)
    assert objective.form == form
    assert objective.path == f"objectives_for_tests:{name}"
    assert callable(objective.fn)


def test_a_plain_objective_loaded_is_the_function_itself() -> None:
    import objectives_for_tests

    assert load_objective("objectives_for_tests:plain").fn is objectives_for_tests.plain


@pytest.mark.parametrize(
    ("path", "message"),
    [
        ("objectives_for_tests:three", "takes 3 required positional arguments (config, budget, extra)"),
        ("objectives_for_tests:none", "takes 0 required positional arguments none"),
        ("objectives_for_tests:keyword_only", "required keyword-only parameters (device)"),
        ("objectives_for_tests:asynchronous", "is an async function"),
        ("objectives_for_tests:generator", "is a generator function"),
        ("objectives_for_tests:NOT_A_FUNCTION", "is an int, not a function"),
        ("objectives_for_tests:plian", 'did you mean "objectives_for_tests:plain"?'),
        ("objectives_that_raise:run", "could not import 'objectives_that_raise': RuntimeError: this module refuses"),
        (
            "no_such_pkg_rw.sub:fn",
            "could not import 'no_such_pkg_rw.sub': ModuleNotFoundError: No module named "
            "'no_such_pkg_rw'; is it installed on every worker, or on PYTHONPATH?",
        ),
        ("objectives_for_tests", "with a colon before the function name"),
        ("a.b:c:d", 'must be "module.path:function"'),
        ("a-b:c", 'must be "module.path:function"'),
        (":c", 'must be "module.path:function"'),
    ],
)
def test_objective_errors(path: str, message: str) -> None:
    with pytest.raises(SpecError) as info:
        load_objective(path)
    assert info.value.field == "objective"
    assert message in str(info.value)
    assert str(info.value).startswith("objective: ")


def test_a_wrong_signature_explains_both_forms() -> None:
    with pytest.raises(SpecError) as info:
        load_objective("objectives_for_tests:three")
    text = str(info.value)
    assert "(config, budget)" in text and "(ctx)" in text
    assert "plain form" in text and "resumable form" in text


def test_the_objective_module_does_not_import_ray() -> None:
    tree = ast.parse((REPO / "workers" / "objective.py").read_text())
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            imported.add(node.module.split(".")[0])
    assert "ray" not in imported
    assert "numpy" in imported  # the walk does see imports


# --------------------------------------------------------------------------------------------
# interpret_result
# --------------------------------------------------------------------------------------------


def test_a_number_is_the_metric() -> None:
    assert interpret_result(0.9, "accuracy", None) == (0.9, {"accuracy": 0.9}, None)
    value, metrics, reason = interpret_result(3, "loss", {"loss": 7.0})
    assert (value, metrics, reason) == (3.0, {"loss": 3.0}, None)
    assert type(value) is float


def test_a_dict_of_metrics() -> None:
    returned = {"accuracy": 0.8, "loss": np.float32(0.25), "epochs": 3}
    value, metrics, reason = interpret_result(returned, "accuracy", {"accuracy": 0.1})
    assert (value, metrics, reason) == (0.8, {"accuracy": 0.8, "loss": 0.25, "epochs": 3.0}, None)
    assert all(type(v) is float for v in metrics.values())


def test_none_takes_the_last_report() -> None:
    assert interpret_result(None, "accuracy", {"accuracy": 0.7, "loss": 0.3}) == (
        0.7,
        {"accuracy": 0.7, "loss": 0.3},
        None,
    )


def test_none_without_a_report_is_bad() -> None:
    for last in (None, {}):
        value, metrics, reason = interpret_result(None, "accuracy", last)
        assert math.isnan(value) and metrics == {}
        assert reason is not None and reason.startswith("returned None and reported nothing")


def test_none_with_a_report_lacking_the_metric_is_bad() -> None:
    value, metrics, reason = interpret_result(None, "accuracy", {"loss": 0.3})
    assert math.isnan(value) and metrics == {"loss": 0.3}
    assert reason is not None and "no 'accuracy'" in reason


def test_a_string_is_bad() -> None:
    value, metrics, reason = interpret_result("0.9", "accuracy", None)
    assert math.isnan(value) and metrics == {}
    assert reason == "returned a str, expected a number or a dict of numbers"


@pytest.mark.parametrize(
    ("returned", "reason"),
    [
        (True, "returned a bool, expected a number or a dict of numbers"),
        ([0.9], "returned a list, expected a number or a dict of numbers"),
        (np.array([0.9, 0.8]), "returned a numpy array of shape (2,), expected a number or a dict of numbers (for a one-element array or tensor, return value.item())"),
        ({"accuracy": "high"}, "returned a dict whose 'accuracy' is a str, expected a number"),
        ({1: 0.5}, "returned a dict with a non-string key 1; metric names are strings"),
        ({"accuracy": True}, "returned a dict whose 'accuracy' is a bool, expected a number"),
    ],
    ids=["bool", "list", "array", "str-value", "int-key", "bool-value"],
)
def test_other_types_are_bad(returned: object, reason: str) -> None:
    value, _, got = interpret_result(returned, "accuracy", None)
    assert math.isnan(value)
    assert got == reason


def test_a_dict_without_the_metric_is_bad() -> None:
    value, metrics, reason = interpret_result({"loss": 0.2}, "accuracy", {"accuracy": 0.5})
    assert math.isnan(value)
    assert metrics == {"loss": 0.2}
    assert reason is not None and reason.startswith("returned no 'accuracy'")


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, np.float64("nan")])
def test_non_finite_values_are_kept_and_flagged(bad: float) -> None:
    value, metrics, reason = interpret_result(bad, "loss", None)
    assert reason == NOT_FINITE == "not finite"
    assert (math.isnan(value) and math.isnan(bad)) or value == bad
    value, metrics, reason = interpret_result({"loss": bad, "acc": 0.5}, "loss", None)
    assert reason == NOT_FINITE
    assert metrics["acc"] == 0.5


def test_a_non_finite_side_metric_does_not_flag_the_result() -> None:
    assert interpret_result({"loss": 0.5, "grad_norm": math.inf}, "loss", None) == (
        0.5,
        {"loss": 0.5, "grad_norm": math.inf},
        None,
    )


@pytest.mark.parametrize(
    "number", [np.float64(0.25), np.float32(0.25), np.int64(2), np.array(0.25), Fraction(1, 4)],
    ids=["float64", "float32", "int64", "0-d array", "fraction"],
)
def test_numpy_and_other_real_numbers(number: object) -> None:
    value, metrics, reason = interpret_result(number, "accuracy", None)
    assert reason is None
    assert type(value) is float and value == float(number)  # type: ignore[arg-type]
    assert metrics == {"accuracy": value}
