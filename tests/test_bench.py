"""The benchmark harness's own logic (no timings are asserted: machines are noisy)."""

from __future__ import annotations

import pytest
from rollscan.bench import core, harness


def _case(name: str, steps: int, versus: str = "") -> harness.Case:
    calls = []
    return harness.Case(
        group="g",
        name=name,
        run=lambda: calls.append(1),
        run_out=lambda: calls.append(2),
        steps=steps,
        versus=versus,
    )


def test_versus_times_both_cases_in_turn_and_reports_per_step():
    cases = [_case("many", 1000), _case("one", 1000, versus="many")]
    rows = harness.run_cases(cases, quick=True)["rows"]
    v = rows[1]["versus"]
    assert v["case"] == "many" and v["out"] is True
    assert v["s"] > 0 and v["other_s"] > 0
    assert v["ratio"] == pytest.approx(v["s"] / v["other_s"])
    assert "per step vs many (out=), timed in turn" in harness._fmt_row(rows[1])
    assert "versus" not in rows[0]


def test_versus_must_name_a_case_with_steps():
    with pytest.raises(ValueError, match="no case 'nothing'"):
        harness.run_cases([_case("one", 10, versus="nothing")], quick=True)


def test_the_one_episode_case_is_compared_with_many_episodes():
    cases = core.cases(quick=True)
    one = [c for c in cases if c.versus]
    assert one, "the one-episode case names its comparison"
    for c in one:
        other = [o for o in cases if o.group == c.group and o.name == c.versus]
        assert len(other) == 1 and other[0].steps == c.steps
