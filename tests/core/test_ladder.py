"""Ladder geometry and Hyperband bracket counts, checked against Li et al."""

from __future__ import annotations

import pytest

from rungway.scheduler.core.errors import SpecError
from rungway.scheduler.core.ladder import Ladder, hyperband_brackets, max_early_stopping_rate


def test_rung_k_has_budget_r_eta_to_the_s_plus_k() -> None:
    assert Ladder(1, 81, 3).budgets == (1, 3, 9, 27, 81)
    assert Ladder(1, 81, 3, early_stopping_rate=2).budgets == (9, 27, 81)
    assert Ladder(2, 32, 2).budgets == (2, 4, 8, 16, 32)


def test_top_rung_is_exactly_max_budget_when_not_a_power_of_eta() -> None:
    assert Ladder(1, 100, 3).budgets == (1, 3, 9, 27, 100)
    assert Ladder(1, 80, 3).budgets == (1, 3, 9, 80)


def test_integer_arithmetic_for_s_max() -> None:
    # Floating point gives log(243) / log(3) = 4.999...; the ladder must see 5 rungs above r.
    assert max_early_stopping_rate(1, 243, 3) == 5
    assert Ladder(1, 243, 3).budgets == (1, 3, 9, 27, 81, 243)
    assert max_early_stopping_rate(1, 242, 3) == 4


def test_float_budgets_are_exact_fractions_of_their_decimal_form() -> None:
    # 0.1 * 9 is 0.9000000000000001 in binary floating point; the ladder still has 3 rungs.
    assert Ladder(0.1, 0.9, 3).budgets == (0.1, pytest.approx(0.3), 0.9)
    assert Ladder(0.1, 0.9, 3).budgets[-1] == 0.9
    assert all(isinstance(b, float) for b in Ladder(0.25, 1.0, 2).budgets)
    assert Ladder(0.25, 1.0, 2).budgets == (0.25, 0.5, 1.0)


@pytest.mark.parametrize(
    ("kwargs", "field", "fragment"),
    [
        ({"min_budget": 0, "max_budget": 9}, "ladder.min_budget", "> 0"),
        ({"min_budget": -1.5, "max_budget": 9}, "ladder.min_budget", "> 0"),
        ({"min_budget": 9, "max_budget": 3}, "ladder.max_budget", ">= min_budget"),
        ({"min_budget": 1, "max_budget": 9, "eta": 1}, "ladder.eta", ">= 2"),
        ({"min_budget": 1, "max_budget": 9, "eta": 2.5}, "ladder.eta", "integer"),
        ({"min_budget": 1, "max_budget": 2, "eta": 3}, "ladder.max_budget", "1 rung(s) but 2"),
        ({"min_budget": 1, "max_budget": 9, "eta": 3, "early_stopping_rate": 3}, "ladder.early_stopping_rate", "0..2"),
        ({"min_budget": float("nan"), "max_budget": 9}, "ladder.min_budget", "finite"),
        ({"min_budget": True, "max_budget": 9}, "ladder.min_budget", "number"),
    ],
)
def test_bad_geometry_names_the_field_and_the_allowed_range(kwargs: dict, field: str, fragment: str) -> None:
    with pytest.raises(SpecError) as info:
        Ladder(**kwargs)
    assert info.value.field == field
    assert fragment in str(info.value)


# Li, Jamieson, DeSalvo, Rostamizadeh, Talwalkar, "Hyperband: A Novel Bandit-Based Approach to
# Hyperparameter Optimization", JMLR 18 (2018). Table 1 lists, for R = 81 and eta = 3, the
# brackets s = 4..0 with (n_i, r_i) per round. Its starting counts are 81, 27, 9, 6, 5; the
# later rounds follow n_i = floor(n * eta**-i) (the per-round values below are recalled from
# memory of the table and agree with that rule).
TABLE_1 = {
    4: [(81, 1), (27, 3), (9, 9), (3, 27), (1, 81)],
    3: [(27, 3), (9, 9), (3, 27), (1, 81)],
    2: [(9, 9), (3, 27), (1, 81)],
    1: [(6, 27), (2, 81)],
    0: [(5, 81)],
}

# The same paper's Algorithm 1 computes n = ceil((s_max + 1) / (s + 1) * eta**s) and
# r = R * eta**-s, then runs successive halving with n_i = floor(n * eta**-i), r_i = r * eta**i.
# Worked here by hand for R = 81, eta = 3, s_max = 4:
#   s=4: ceil(5/5*81) = 81   s=3: ceil(5/4*27) = ceil(33.75) = 34   s=2: ceil(5/3*9) = 15
#   s=1: ceil(5/2*3) = ceil(7.5) = 8   s=0: ceil(5/1*1) = 5
ALGORITHM_1 = {
    4: [(81, 1), (27, 3), (9, 9), (3, 27), (1, 81)],
    3: [(34, 3), (11, 9), (3, 27), (1, 81)],
    2: [(15, 9), (5, 27), (1, 81)],
    1: [(8, 27), (2, 81)],
    0: [(5, 81)],
}


@pytest.mark.parametrize(("variant", "expected"), [("table", TABLE_1), ("formula", ALGORITHM_1)])
def test_hyperband_brackets_for_r81_eta3(variant: str, expected: dict) -> None:
    brackets = hyperband_brackets(1, 81, 3, variant=variant)  # type: ignore[arg-type]
    assert [b.s for b in brackets] == [4, 3, 2, 1, 0]
    for bracket in brackets:
        got = list(zip(bracket.counts, bracket.ladder.budgets, strict=True))
        assert got == expected[bracket.s], f"bracket s={bracket.s}"


def test_hyperband_rejects_unknown_variant() -> None:
    with pytest.raises(SpecError, match="hyperband_counts"):
        hyperband_brackets(1, 81, 3, variant="other")  # type: ignore[arg-type]
