"""Tests of rungway.scheduler.core.space: parsing, checks, the unit-cube map, the schema.

Each check names the outside source it is measured against.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import BaseModel, ValidationError
from scipy import stats

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.space import (
    KINDS,
    SearchSpace,
    SpaceModel,
    spec_error_from_validation,
)

REPO = Path(__file__).resolve().parents[2]
SCHEMA_FILE = REPO / "docs" / "search-space.schema.json"

EXAMPLE_TOML = """\
[space.learning_rate]
kind = "real"
lower = 1e-4
upper = 0.3
scale = "log"
[space.optimizer]
kind = "category"
options = ["sgd", "adam"]
[space.momentum]
kind = "real"
lower = 0.0
upper = 0.99
only_if = { optimizer = ["sgd"] }
"""

EXAMPLE = {
    "learning_rate": {"kind": "real", "lower": 1e-4, "upper": 0.3, "scale": "log"},
    "optimizer": {"kind": "category", "options": ["sgd", "adam"]},
    "momentum": {"kind": "real", "lower": 0.0, "upper": 0.99, "only_if": {"optimizer": ["sgd"]}},
}


def one(kind: str, **fields: Any) -> dict[str, Any]:
    return {"kind": kind, **fields}


# --------------------------------------------------------------------------------------------
# Distributions
# --------------------------------------------------------------------------------------------


def test_log_real_draws_follow_loguniform() -> None:
    # Source: scipy.stats.loguniform(a, b) (density 1 / (x log(b/a))), Kolmogorov-Smirnov test
    # via scipy.stats.kstest.
    lower, upper = 1e-4, 0.3
    space = SearchSpace.from_mapping({"lr": one("real", lower=lower, upper=upper, scale="log")})
    rng = np.random.default_rng(12345)
    draws = np.array([space.sample(rng)["lr"] for _ in range(4000)])
    assert draws.min() >= lower and draws.max() <= upper
    assert stats.kstest(draws, stats.loguniform(lower, upper).cdf).pvalue > 0.01
    # The same test rejects a plain uniform law on [lower, upper], so the check can fail.
    assert stats.kstest(draws, stats.uniform(lower, upper - lower).cdf).pvalue < 1e-6


def test_linear_real_draws_follow_uniform() -> None:
    # Source: scipy.stats.uniform(loc, scale), scipy.stats.kstest.
    space = SearchSpace.from_mapping({"x": one("real", lower=-2.0, upper=5.0)})
    rng = np.random.default_rng(7)
    draws = np.array([space.sample(rng)["x"] for _ in range(4000)])
    assert stats.kstest(draws, stats.uniform(-2.0, 7.0).cdf).pvalue > 0.01
    # ... and rejects a uniform law on a slightly wrong interval.
    assert stats.kstest(draws, stats.uniform(-2.0, 6.0).cdf).pvalue < 1e-6


def test_log_integer_draws_have_the_discretised_loguniform_law() -> None:
    # Source: scipy.stats.loguniform(lower, upper + 1): an integer v is drawn with probability
    # cdf(v + 1) - cdf(v) (the draw is floor of a log-uniform on [lower, upper + 1)); checked
    # with scipy.stats.chisquare.
    lower, upper = 1, 20
    space = SearchSpace.from_mapping({"n": one("integer", lower=lower, upper=upper, scale="log")})
    rng = np.random.default_rng(2024)
    draws = np.array([space.sample(rng)["n"] for _ in range(20000)])
    assert all(isinstance(v, int) for v in draws.tolist())
    support = np.arange(lower, upper + 1)
    assert set(draws.tolist()) == set(support.tolist())  # every integer, nothing outside
    observed = np.array([(draws == v).sum() for v in support])
    law = stats.loguniform(lower, upper + 1)
    expected = (law.cdf(support + 1) - law.cdf(support)) * len(draws)
    assert expected.sum() == pytest.approx(len(draws))
    assert stats.chisquare(observed, expected).pvalue > 0.01
    # A uniform law over the same integers is rejected, so the check can fail.
    flat = np.full(len(support), len(draws) / len(support))
    assert stats.chisquare(observed, flat).pvalue < 1e-6


def test_linear_integer_draws_are_uniform_over_the_inclusive_range() -> None:
    # Source: scipy.stats.randint(low, high) (uniform on low..high-1), scipy.stats.chisquare.
    space = SearchSpace.from_mapping({"k": one("integer", lower=-3, upper=4)})
    rng = np.random.default_rng(99)
    draws = np.array([space.sample(rng)["k"] for _ in range(16000)])
    support = np.arange(-3, 5)
    assert set(draws.tolist()) == set(support.tolist())
    observed = np.array([(draws == v).sum() for v in support])
    expected = stats.randint(-3, 5).pmf(support) * len(draws)
    assert stats.chisquare(observed, expected).pvalue > 0.01


def test_category_draws_are_uniform() -> None:
    # Source: scipy.stats.chisquare against equal frequencies.
    options = ["a", 1, 2.5, True, False]
    space = SearchSpace.from_mapping({"c": one("category", options=options)})
    rng = np.random.default_rng(3)
    draws = [space.sample(rng)["c"] for _ in range(10000)]
    # Compare by (type, value): True and 1 are different options.
    keys = [(type(v), v) for v in draws]
    observed = np.array([keys.count((type(o), o)) for o in options])
    assert observed.sum() == len(draws)
    assert stats.chisquare(observed).pvalue > 0.01


def test_from_unit_maps_the_cube_faces_to_the_bounds() -> None:
    # Source: the mapping defined in docs/search-spaces.md (values by hand).
    space = SearchSpace.from_mapping(
        {
            "r": one("real", lower=1e-3, upper=10.0, scale="log"),
            "i": one("integer", lower=2, upper=9),
            "j": one("integer", lower=1, upper=1000, scale="log"),
            "c": one("category", options=["x", "y", "z"]),
        }
    )
    low = space.from_unit([0.0, 0.0, 0.0, 0.0])
    assert low == {"r": pytest.approx(1e-3), "i": 2, "j": 1, "c": "x"}
    top = space.from_unit([1 - 1e-12] * 4)
    assert top == {"r": pytest.approx(10.0), "i": 9, "j": 1000, "c": "z"}
    assert space.from_unit([1.0] * 4) == top | {"r": 10.0}  # u = 1 is clipped to upper
    mid = space.from_unit(np.array([0.5, 0.5, 0.5, 0.5]))
    # log scale: the geometric mean; integers: floor(2 + 0.5 * 8) = 6; j: floor(sqrt(1001)) = 31.
    assert mid == {"r": pytest.approx(math.sqrt(1e-3 * 10.0)), "i": 6, "j": 31, "c": "y"}
    assert type(mid["r"]) is float and type(mid["i"]) is int and type(mid["j"]) is int
    with pytest.raises(ValueError):
        space.from_unit([0.5, 0.5])


def test_unit_of_inverts_value_at() -> None:
    # Source: the mapping defined in docs/search-spaces.md; x = value_at(unit_of(x)).
    space = SearchSpace.from_mapping(
        {
            "r": one("real", lower=1e-3, upper=10.0, scale="log"),
            "i": one("integer", lower=2, upper=9),
            "j": one("integer", lower=1, upper=1000, scale="log"),
            "c": one("category", options=["x", "y", "z"]),
        }
    )
    for name, values in {
        "r": [1e-3, 0.01, 3.3, 10.0],
        "i": list(range(2, 10)),
        "j": [1, 2, 3, 10, 999, 1000],
        "c": ["x", "y", "z"],
    }.items():
        for v in values:
            assert space.value_at(name, space.unit_of(name, v)) == pytest.approx(v)


# --------------------------------------------------------------------------------------------
# Structure, files, round trip
# --------------------------------------------------------------------------------------------


def test_names_are_parents_first_and_dimensions_skip_constants() -> None:
    # Source: topological order (Kahn 1962, "Topological sorting of large networks").
    space = SearchSpace.from_mapping(
        {
            "momentum": one("real", lower=0.0, upper=1.0, only_if={"optimizer": ["sgd"]}),
            "epochs": one("constant", value=10),
            "nesterov": one("category", options=[True, False], only_if={"momentum": [0.5]}),
            "optimizer": one("category", options=["sgd", "adam"]),
        }
    )
    names = space.names
    assert set(names) == {"momentum", "epochs", "nesterov", "optimizer"}
    assert names.index("optimizer") < names.index("momentum") < names.index("nesterov")
    assert space.dimensions == tuple(n for n in names if n != "epochs")
    assert list(space.to_mapping()) == ["momentum", "epochs", "nesterov", "optimizer"]


def test_example_from_toml_both_layouts_and_json(tmp_path: Path) -> None:
    # Source: TOML v1.0.0 as read by the standard library's tomllib; JSON (RFC 8259) via json.
    wrapped = tmp_path / "spec.toml"
    wrapped.write_text(EXAMPLE_TOML + '\n[sampler]\nkind = "random"\n')
    bare = tmp_path / "space.toml"
    bare.write_text(EXAMPLE_TOML.replace("[space.", "["))
    as_json = tmp_path / "space.json"
    as_json.write_text(json.dumps({"space": EXAMPLE}))
    bare_json = tmp_path / "bare.json"
    bare_json.write_text(json.dumps(EXAMPLE))
    expected = SearchSpace.from_mapping(EXAMPLE)
    for space in (
        SearchSpace.from_toml(wrapped),
        SearchSpace.from_toml(bare),
        SearchSpace.from_json(as_json),
        SearchSpace.from_json(bare_json),
    ):
        assert space == expected
        assert space.dimensions == ("learning_rate", "optimizer", "momentum")
    params = expected.parameters
    assert params["learning_rate"].scale == "log" and params["momentum"].scale == "linear"


def test_a_parameter_named_space_is_not_taken_for_the_wrapper(tmp_path: Path) -> None:
    # Source: TOML v1.0.0 (tomllib); a table with a `kind` field is a parameter.
    path = tmp_path / "s.toml"
    path.write_text('[space]\nkind = "constant"\nvalue = 1\n')
    assert SearchSpace.from_toml(path).names == ("space",)


def test_broken_files_raise_spec_error(tmp_path: Path) -> None:
    # Source: TOML v1.0.0 (tomllib rejects the unterminated string) and RFC 8259 JSON.
    bad_toml = tmp_path / "bad.toml"
    bad_toml.write_text('[space.x]\nkind = "real\n')
    with pytest.raises(SpecError, match="not valid TOML"):
        SearchSpace.from_toml(bad_toml)
    bad_json = tmp_path / "bad.json"
    bad_json.write_text('{"x": ')
    with pytest.raises(SpecError, match="not valid JSON"):
        SearchSpace.from_json(bad_json)
    with pytest.raises(SpecError, match="cannot read"):
        SearchSpace.from_toml(tmp_path / "missing.toml")


def test_to_mapping_round_trips() -> None:
    # Source: JSON (RFC 8259) round trip through the standard library's json module.
    space = SearchSpace.from_mapping(EXAMPLE | {"tag": one("constant", value="v1")})
    again = SearchSpace.from_mapping(json.loads(json.dumps(space.to_mapping())))
    assert again == space
    assert again.to_mapping() == space.to_mapping()


# --------------------------------------------------------------------------------------------
# Broken spaces
# --------------------------------------------------------------------------------------------

REAL = one("real", lower=0.0, upper=1.0)

# (case, space, expected field, words the message must contain)
BROKEN: list[tuple[str, dict[str, Any], str, list[str]]] = [
    ("unknown kind", {"lr": one("rael", lower=0, upper=1)}, "space.lr.kind", ['"real"', '"rael"']),
    ("kind missing", {"lr": {"lower": 0, "upper": 1}}, "space.lr.kind", ["missing"]),
    ("not a table", {"lr": 3}, "space.lr", ["table"]),
    ("missing upper", {"lr": one("real", lower=0.0)}, "space.lr.upper", ["missing"]),
    ("missing options", {"opt": one("category")}, "space.opt.options", ["missing"]),
    ("missing value", {"c": one("constant")}, "space.c.value", ["missing"]),
    ("lower == upper", {"lr": one("real", lower=1.0, upper=1.0)}, "space.lr.lower", ["< upper"]),
    ("lower > upper", {"n": one("integer", lower=5, upper=2)}, "space.n.lower", ["< upper"]),
    (
        "log with negative lower",
        {"learning_rate": one("real", lower=-1.0, upper=1.0, scale="log")},
        "space.learning_rate.lower",
        ['must be > 0 when scale = "log" (got -1.0)'],
    ),
    ("log with zero lower", {"lr": one("real", lower=0.0, upper=1.0, scale="log")}, "space.lr.lower", ["> 0"]),
    ("integer log from 0", {"n": one("integer", lower=0, upper=9, scale="log")}, "space.n.lower", [">= 1"]),
    ("unknown scale", {"lr": one("real", lower=0.1, upper=1.0, scale="ln")}, "space.lr.scale", ['"log"', '"ln"']),
    ("string bound", {"lr": one("real", lower="0", upper=1.0)}, "space.lr.lower", ["number"]),
    ("infinite bound", {"lr": one("real", lower=0.0, upper=math.inf)}, "space.lr.upper", ["finite"]),
    ("fractional integer bound", {"n": one("integer", lower=0.5, upper=3)}, "space.n.lower", ["integer"]),
    ("boolean integer bound", {"n": one("integer", lower=True, upper=3)}, "space.n.lower", ["integer"]),
    ("empty options", {"opt": one("category", options=[])}, "space.opt.options", ["at least one"]),
    ("duplicate options", {"opt": one("category", options=["sgd", "adam", "sgd"])}, "space.opt.options", ['"sgd"', "twice"]),
    ("1 and 1.0 duplicate", {"opt": one("category", options=[1, 1.0])}, "space.opt.options", ["twice"]),
    ("null option", {"opt": one("category", options=["a", None])}, "space.opt.options[1]", ["string"]),
    ("typo'd field", {"lr": one("real", lowr=0.0, upper=1.0)}, "space.lr.lowr", ['"lower"', "unknown field"]),
    ("field of another kind", {"opt": one("category", options=["a"], lower=0)}, "space.opt.lower", ["unknown field"]),
    (
        "only_if unknown parent",
        {"momentum": REAL | {"only_if": {"optimzer": ["sgd"]}}, "optimizer": one("category", options=["sgd"])},
        "space.momentum.only_if.optimzer",
        ['"optimzer"', '"optimizer"'],
    ),
    (
        "only_if value not an option",
        {"momentum": REAL | {"only_if": {"optimizer": ["sdg"]}}, "optimizer": one("category", options=["sgd", "adam"])},
        "space.momentum.only_if.optimizer",
        ['"sdg"', '"sgd"'],
    ),
    (
        "only_if value out of range",
        {"a": REAL | {"only_if": {"n": [11]}}, "n": one("integer", lower=1, upper=10)},
        "space.a.only_if.n",
        ["11", "[1, 10]"],
    ),
    (
        "only_if value of the wrong type",
        {"a": REAL | {"only_if": {"flag": [1]}}, "flag": one("category", options=[True, False])},
        "space.a.only_if.flag",
        ["1", "true"],
    ),
    (
        "only_if on a constant's other value",
        {"a": REAL | {"only_if": {"c": ["x"]}}, "c": one("constant", value="y")},
        "space.a.only_if.c",
        ['"x"', '"y"'],
    ),
    (
        "cycle",
        {"a": REAL | {"only_if": {"b": [0.5]}}, "b": REAL | {"only_if": {"a": [0.5]}}},
        "space.a.only_if.b",
        ["cycle", "a -> b -> a"],
    ),
    (
        "longer cycle",
        {
            "x": REAL,
            "a": REAL | {"only_if": {"c": [0.5]}},
            "b": REAL | {"only_if": {"a": [0.5]}},
            "c": REAL | {"only_if": {"b": [0.5], "x": [0.5]}},
        },
        "space.a.only_if.c",
        ["a -> c -> b -> a"],
    ),
    ("self condition", {"a": REAL | {"only_if": {"a": [0.5]}}}, "space.a.only_if.a", ["itself"]),
    ("empty only_if", {"a": REAL | {"only_if": {}}}, "space.a.only_if", ["at least one"]),
    ("only_if lists nothing", {"a": REAL | {"only_if": {"b": []}}, "b": REAL}, "space.a.only_if.b", ["at least one"]),
    ("only_if not a list", {"a": REAL | {"only_if": {"b": 0.5}}, "b": REAL}, "space.a.only_if.b", ["list"]),
    ("empty space", {}, "space", ["at least one parameter"]),
    ("dotted name", {"a.b": REAL}, "space", ['"a.b"']),
]


@pytest.mark.parametrize(
    ("space", "field", "words"), [c[1:] for c in BROKEN], ids=[c[0] for c in BROKEN]
)
def test_broken_spaces_raise_spec_error_naming_parameter_and_field(
    space: dict[str, Any], field: str, words: list[str]
) -> None:
    # Source: the rules of docs/search-spaces.md, one broken space per rule.
    with pytest.raises(SpecError) as info:
        SearchSpace.from_mapping(space)
    err = info.value
    assert err.field == field
    message = str(err)
    assert message.startswith(field + ": ")
    for word in words:
        assert word in message
    parameter = field.split(".")[1] if field.count(".") >= 1 else None
    if parameter:
        assert parameter.split("[")[0] in message


def test_several_problems_are_all_reported() -> None:
    # Source: pydantic's ValidationError lists every failing field (pydantic v2 docs, "Errors").
    with pytest.raises(SpecError) as info:
        SearchSpace.from_mapping({"a": one("real", lower="x", upper="y"), "b": one("category", options=[])})
    lines = str(info.value).splitlines()
    assert lines[0].startswith("space.a.lower: ")
    assert any(line.startswith("space.a.upper: ") for line in lines)
    assert any(line.startswith("space.b.options: ") for line in lines)


def test_spec_error_from_validation_builds_dotted_paths() -> None:
    # Source: pydantic v2 ValidationError.errors() `loc` tuples; a spec model that embeds the
    # space model, as the spec-file loader will.
    class Inner(BaseModel):
        sizes: list[int]

    class Spec(BaseModel):
        space: SpaceModel
        inner: Inner

    data = {"space": {"lr": one("real", lower="x", upper=1.0)}, "inner": {"sizes": [1, "two"]}}
    with pytest.raises(ValidationError) as info:
        Spec.model_validate(data)
    err = spec_error_from_validation(info.value, "spec")
    assert err.field == "spec.space.lr.lower"  # the "kind=real" branch tag is dropped
    assert "spec.inner.sizes[1]: " in str(err)
    assert spec_error_from_validation(info.value).field == "space.lr.lower"


# --------------------------------------------------------------------------------------------
# Configurations
# --------------------------------------------------------------------------------------------


def test_validate_config() -> None:
    # Source: the conditional-parameter rule of docs/search-spaces.md, cases by hand.
    space = SearchSpace.from_mapping(EXAMPLE | {"epochs": one("constant", value=3)})
    good = {"learning_rate": 0.01, "optimizer": "sgd", "momentum": 0.9, "epochs": 3}
    space.validate_config(good)
    space.validate_config({"learning_rate": 0.01, "optimizer": "adam", "epochs": 3})
    bad = [
        (good | {"momentum": 1.5}, "config.momentum", "[0.0, 0.99]"),
        (good | {"optimizer": "adam"}, "config.momentum", "absent"),
        ({k: v for k, v in good.items() if k != "momentum"}, "config.momentum", "missing"),
        (good | {"optimizer": "rmsprop"}, "config.optimizer", '"rmsprop"'),
        (good | {"learning_rate": "0.01"}, "config.learning_rate", "number"),
        (good | {"learning_rate": math.nan}, "config.learning_rate", "finite"),
        (good | {"epochs": 4}, "config.epochs", "3"),
        (good | {"learnig_rate": 0.1}, "config.learnig_rate", '"learning_rate"'),
    ]
    for config, field, word in bad:
        assert not space.is_valid(config)
        with pytest.raises(SpecError) as info:
            space.validate_config(config)
        assert info.value.field == field
        assert word in str(info.value)
    assert space.is_valid(good)


def test_integers_reject_floats_and_booleans_in_configs() -> None:
    # Source: Python's data model (bool is a subclass of int), cases by hand.
    space = SearchSpace.from_mapping({"n": one("integer", lower=0, upper=5)})
    assert space.is_valid({"n": 3})
    assert space.is_valid({"n": np.int64(3)})
    assert not space.is_valid({"n": 3.0})
    assert not space.is_valid({"n": True})


def test_complete_repairs_a_config() -> None:
    # Source: the conditional-parameter rule of docs/search-spaces.md.
    space = SearchSpace.from_mapping(EXAMPLE)
    rng = np.random.default_rng(0)
    fixed = space.complete({"learning_rate": 0.01, "optimizer": "adam", "momentum": 0.5, "junk": 1}, rng)
    assert fixed == {"learning_rate": 0.01, "optimizer": "adam"}
    filled = space.complete({"optimizer": "sgd"}, rng)
    assert set(filled) == {"learning_rate", "optimizer", "momentum"}
    assert space.is_valid(filled)


# --------------------------------------------------------------------------------------------
# Properties (hypothesis)
# --------------------------------------------------------------------------------------------

finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)
scalars = st.one_of(
    st.text(max_size=4),
    st.integers(-5, 5),
    st.booleans(),
    st.floats(-10, 10, allow_nan=False, allow_infinity=False),
)


def same_value(a: Any, b: Any) -> bool:
    """Equality that tells booleans from numbers (True is not 1), as the docs specify."""
    return isinstance(a, bool) == isinstance(b, bool) and isinstance(a, str) == isinstance(b, str) and a == b


def key(v: Any) -> Any:
    return ("b", v) if isinstance(v, bool) else ("s", v) if isinstance(v, str) else ("n", v)


@st.composite
def parameter(draw: st.DrawFn, kind: str) -> dict[str, Any]:
    if kind == "real":
        if draw(st.booleans()):
            lower = draw(st.floats(1e-6, 1e3))
            upper = lower * draw(st.floats(1.001, 1e4))
            return one("real", lower=lower, upper=upper, scale="log")
        lower = draw(finite)
        return one("real", lower=lower, upper=lower + draw(st.floats(1e-3, 1e6)))
    if kind == "integer":
        if draw(st.booleans()):
            lower = draw(st.integers(1, 10**6))
            return one("integer", lower=lower, upper=lower + draw(st.integers(1, 10**6)), scale="log")
        lower = draw(st.integers(-(10**6), 10**6))
        return one("integer", lower=lower, upper=lower + draw(st.integers(1, 10**6)))
    if kind == "category":
        return one("category", options=draw(st.lists(scalars, min_size=1, max_size=5, unique_by=key)))
    return one("constant", value=draw(scalars))


@st.composite
def possible_values(draw: st.DrawFn, param: dict[str, Any]) -> list[Any]:
    kind = param["kind"]
    if kind == "category":
        return draw(st.lists(st.sampled_from(param["options"]), min_size=1, max_size=3, unique_by=key))
    if kind == "constant":
        return [param["value"]]
    if kind == "integer":
        values = st.integers(param["lower"], min(param["upper"], param["lower"] + 3))
    else:
        values = st.sampled_from([param["lower"], param["upper"]])
    return draw(st.lists(values, min_size=1, max_size=3, unique=True))


@st.composite
def spaces(draw: st.DrawFn) -> dict[str, dict[str, Any]]:
    """Valid spaces: conditions only on earlier parameters (so no cycles), declared shuffled."""
    n = draw(st.integers(1, 6))
    params: dict[str, dict[str, Any]] = {}
    for i in range(n):
        param = draw(parameter(draw(st.sampled_from(KINDS))))
        if params and draw(st.booleans()):
            parents = draw(st.lists(st.sampled_from(sorted(params)), min_size=1, max_size=2, unique=True))
            param["only_if"] = {p: draw(possible_values(params[p])) for p in parents}
        params[f"p{i}"] = param
    order = draw(st.permutations(list(params)))
    return {name: params[name] for name in order}


def expected_presence(table: dict[str, dict[str, Any]], config: dict[str, Any]) -> dict[str, bool]:
    """Presence of each parameter by the documented rule, from the config itself."""
    out = {}
    for name, param in table.items():
        conds = param.get("only_if", {})
        out[name] = all(
            p in config and any(same_value(config[p], v) for v in values) for p, values in conds.items()
        )
    return out


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_from_unit_gives_valid_configs(data: st.DataObject) -> None:
    # Source: the search-space rules of docs/search-spaces.md, checked by an independent
    # re-statement (expected_presence and the bounds below) on hypothesis-generated spaces.
    table = data.draw(spaces())
    space = SearchSpace.from_mapping(table)
    d = len(space.dimensions)
    u = data.draw(st.lists(st.floats(0.0, 1.0, exclude_max=True), min_size=d, max_size=d))
    config = space.from_unit(u)
    space.validate_config(config)
    assert expected_presence(table, config) == {n: n in config for n in table}
    for name, value in config.items():
        param = table[name]
        if param["kind"] in ("real", "integer"):
            assert param["lower"] <= value <= param["upper"]
            assert isinstance(value, int if param["kind"] == "integer" else float)
        elif param["kind"] == "category":
            assert any(same_value(value, o) for o in param["options"])
        else:
            assert same_value(value, param["value"])
    assert SearchSpace.from_mapping(space.to_mapping()) == space


@settings(max_examples=100, deadline=None)
@given(table=spaces(), seed=st.integers(0, 2**32 - 1))
def test_sample_gives_valid_configs(table: dict[str, dict[str, Any]], seed: int) -> None:
    # Source: as above; draws through a numpy Generator (numpy.random.default_rng).
    space = SearchSpace.from_mapping(table)
    rng = np.random.default_rng(seed)
    for _ in range(5):
        config = space.sample(rng)
        assert space.is_valid(config)
        assert expected_presence(table, config) == {n: n in config for n in table}


# --------------------------------------------------------------------------------------------
# Published schema
# --------------------------------------------------------------------------------------------


def test_schema_file_matches_the_model() -> None:
    # Source: the model itself (pydantic's model_json_schema); the file must not drift.
    on_disk = json.loads(SCHEMA_FILE.read_text())
    assert on_disk == SearchSpace.json_schema()
    assert on_disk["$schema"] == "https://json-schema.org/draft/2020-12/schema"


def test_schema_script_prints_the_file() -> None:
    # Source: docs/search-spaces.md says the file is the output of this command.
    out = subprocess.run(
        [sys.executable, "-m", "rungway.scheduler.core.space", "--schema"],
        capture_output=True,
        text=True,
        check=True,
        cwd=REPO,
    )
    assert out.stdout == SCHEMA_FILE.read_text()


def test_schema_accepts_good_and_rejects_malformed_spaces() -> None:
    # Source: JSON Schema draft 2020-12 as implemented by the jsonschema package.
    jsonschema = pytest.importorskip("jsonschema")
    schema = SearchSpace.json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    assert validator.is_valid(EXAMPLE)
    assert validator.is_valid({"c": one("constant", value=True), "n": one("integer", lower=1, upper=8, scale="log")})
    for bad in (
        {"lr": one("real", lowr=0.0, upper=1.0)},
        {"lr": {"lower": 0.0, "upper": 1.0}},
        {"lr": one("real", lower=0.0, upper=1.0, scale="ln")},
        {"opt": one("category", options=[])},
        {"opt": one("category", options=["a", "a"])},
        {"n": one("integer", lower=0.5, upper=3)},
        {"a.b": one("constant", value=1)},
        {},
    ):
        assert not validator.is_valid(bad), bad
        with pytest.raises(SpecError):
            SearchSpace.from_mapping(bad)
