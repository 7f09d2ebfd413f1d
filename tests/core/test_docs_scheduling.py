"""docs/scheduling.md agrees with the code it describes."""

from __future__ import annotations

import re
from pathlib import Path

from rungway.scheduler.core.ladder import Ladder, hyperband_brackets
from rungway.scheduler.core.states import TRANSITIONS, mermaid_diagram

DOC = Path(__file__).resolve().parents[2] / "docs" / "scheduling.md"


def mermaid_blocks() -> list[str]:
    return re.findall(r"```mermaid\n(.*?)\n```", DOC.read_text(encoding="utf-8"), flags=re.S)


def test_the_state_diagram_in_the_doc_is_the_one_generated_from_the_transition_table() -> None:
    # Source: scheduler/core/states.py, mermaid_diagram() (the doc is its output, pasted).
    blocks = mermaid_blocks()
    assert len(blocks) == 1
    assert blocks[0] == mermaid_diagram()
    # The generator draws every transition of the table, once.
    assert len([line for line in blocks[0].splitlines() if ": " in line]) == len(TRANSITIONS) + 1


def test_the_worked_ladder_and_hyperband_table_in_the_doc_match_the_code() -> None:
    # Source: Li et al., JMLR 2018, Algorithm 1 (n = ceil((s_max + 1) / (s + 1) * eta^s)) and
    # Table 1 (R = 81, eta = 3: 81, 27, 9, 6, 5 trials per bracket; recalled from memory).
    text = DOC.read_text(encoding="utf-8")
    assert Ladder(1, 81, 3).budgets == (1, 3, 9, 27, 81)
    assert Ladder(1, 100, 3).budgets == (1, 3, 9, 27, 100) and "1, 3, 9, 27, 100" in text
    assert Ladder(0.1, 0.9, 3).budgets == (0.1, 0.3, 0.9) and "0.1, 0.3, 0.9" in text
    formula = [b.n for b in hyperband_brackets(1, 81, 3, "formula")]
    table = [b.n for b in hyperband_brackets(1, 81, 3, "table")]
    assert formula == [81, 34, 15, 8, 5] and table == [81, 27, 9, 6, 5]
    assert "81, 34, 15, 8, 5 trials by the formula and 81, 27, 9, 6, 5 by the table" in text
    for fb, tb in zip(hyperband_brackets(1, 81, 3, "formula"), hyperband_brackets(1, 81, 3, "table"), strict=True):
        row = re.search(rf"^\| {fb.s} \| (.*?)\|(.*?)\|(.*?)\|$", text, flags=re.M)
        assert row is not None, fb.s
        budgets, by_formula, by_table = (cell.replace("*", "").strip() for cell in row.groups())
        assert budgets == ", ".join(map(str, fb.ladder.budgets))
        assert by_formula == ", ".join(map(str, fb.counts))
        assert by_table == ", ".join(map(str, tb.counts))
    # Worked ladder: successive halving's budget, resumed from checkpoints, against full budget.
    counts = hyperband_brackets(1, 81, 3)[0].counts
    budgets = (0, *Ladder(1, 81, 3).budgets)
    spent = sum(n * (budgets[i + 1] - budgets[i]) for i, n in enumerate(counts))
    assert counts == (81, 27, 9, 3, 1) and spent == 297 and "**297**" in text
    assert f"**{81 * 81:,}**" in text  # 81 trials at the full budget 81
