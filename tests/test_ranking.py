"""The typed ranking entry: the score's fields, JSON both ways, the ranking's order."""

from __future__ import annotations

import dataclasses
import json
import math

import pytest

from optimizer.evaluate import NO_MARGINS, Score, TrajectoryScore
from optimizer.metrics import TrackMetrics
from optimizer.ranking import ROBUST_FIELDS, SCORE_FIELDS, Entry, EntryError, rank, relative
from optimizer.robust import RobustScore


def _score(error: float, feasible: bool = True, label: str = "p") -> Score:
    m = TrackMetrics(**{f.name: 1.0 for f in dataclasses.fields(TrackMetrics)})
    tr = TrajectoryScore("line", m, NO_MARGINS, False, None, 10, error)
    return Score(
        label=label, kind="plan", tiers=2, plan_text="[all] t1 r1 z0.8", feasible=feasible,
        reason=None if feasible else "unstable", pos_rms_mm=1.0, rot_rms_deg=0.5,
        pos_max_mm=2.0, rot_max_deg=1.0, tau_rms_nm=3.0, peak_torque_ratio=0.4,
        path_at_mm=None, stiffness_margin=2.5, delay_margin_ms=math.inf,
        bandwidth_margin=1.7, slowest_mode_s=0.3, delay_cap_ms=20.0, error_index=error,
        steps=10, trajectories=(tr,),
    )


def _robust(error: float, draws: tuple[float, ...] = (1.0, 2.0)) -> RobustScore:
    return RobustScore(_score(error), tuple(_score(d) for d in draws), plants=len(draws))


def test_the_entry_holds_every_field_a_score_and_a_robust_score_write() -> None:
    """A field added to Score or RobustScore without one here fails this test."""
    s = _robust(1.5)
    d = s.to_dict()
    assert list(d)[: len(SCORE_FIELDS)] == list(SCORE_FIELDS)
    assert list(d)[len(SCORE_FIELDS):] == list(ROBUST_FIELDS)
    e = Entry.from_dict(d)
    assert e.extra == {} and e.to_dict() == d and list(e.to_dict()) == list(d)
    assert e.delay_margin_ms is None  # non-finite figures are None, as in the JSON
    assert e.robust and e.value == pytest.approx(s.robust_error)
    nominal = Entry.from_dict(_score(1.5).to_dict())  # scored without perturbed plants
    assert not nominal.robust and nominal.value == 1.5 and "plants" not in nominal.to_dict()


def test_a_ranked_entry_goes_through_json_unchanged() -> None:
    e = dataclasses.replace(
        Entry.from_dict(_robust(1.5).to_dict()),
        rank=3, trial=17, source="search", plan_toml="x", pareto=True,
        vs_tuned_osc=-0.25, vs_tuned_joint=None, extra={"previous_rank": 2},
    )
    back = Entry.from_dict(json.loads(json.dumps(e.to_dict())))
    assert back == e
    written = e.to_dict(plan=False)
    assert "plan_toml" not in written and written["vs_tuned_joint"] is None
    assert next(iter(written)) == "rank" and written["previous_rank"] == 2
    assert "late_gain" not in written  # only a tuned baseline's


@pytest.mark.parametrize(
    ("key", "value", "reason"),
    [("error_index", "low", "must be a number or null"), ("feasible", 1, "must be bool"),
     ("rank", 1.5, "must be a whole number"), ("trajectories", {}, "must be list"),
     ("tiers", True, "must be a number or null")],
)
def test_a_field_of_the_wrong_type_is_named(key: str, value: object, reason: str) -> None:
    with pytest.raises(EntryError) as err:
        Entry.from_dict({key: value})
    assert err.value.key == key and err.value.reason.startswith(reason)


def _e(value: float | None, source: str = "search", label: str = "", **kw: object) -> Entry:
    return Entry(label=label or f"e{value}", error_index=value, source=source, feasible=True,
                 **kw)  # type: ignore[arg-type]


def test_rank_keeps_the_top_and_every_plan_the_user_must_see() -> None:
    plans = [_e(1.0), _e(2.0), _e(3.0, "hand"), _e(4.0, pareto=True), _e(5.0),
             _e(6.0, "ladder", "ladder: suggested plan"), _e(None, "previous")]
    baselines = [_e(2.5, "tuned", kind="osc"), _e(0.5, "tuned", kind="joint_space")]
    ranked = rank(plans, baselines, top=2)
    assert [e.value for e in ranked] == [0.5, 1.0, 2.0, 2.5, 3.0, 4.0, 6.0, math.inf]
    assert [e.rank for e in ranked] == list(range(1, 9))
    assert all(e.rank is None for e in plans)  # ranked copies; the inputs are left alone
    assert all(e.value != 5.0 for e in ranked)  # beyond the top and nothing special


def test_relative_change_against_a_baseline() -> None:
    """(a / b − 1): −0.25 is 25 % lower; None when either is not finite or there is none."""
    assert relative(_e(1.5), _e(2.0)) == pytest.approx(-0.25)
    assert relative(_e(1.5), None) is None
    assert relative(_e(None), _e(2.0)) is None and relative(_e(1.0), _e(0.0)) is None
    robust = Entry.from_dict(_robust(9.0, (1.0, 1.0)).to_dict())
    assert robust.value == pytest.approx(robust.robust_error)  # robust error, not nominal


def test_the_compare_table_calls_a_plant_failure_not_feasible() -> None:
    """``compare``'s 'feasible' cell agrees with the line under the table: a candidate
    feasible on the nominal plant but failing on one of its perturbed plants is 'no'."""
    from rich.console import Console

    from optimizer.report import reasons, robustness_table

    held = RobustScore(_score(1.0, label="holds"), (_score(1.2), _score(1.3)), plants=2)
    fails = RobustScore(
        _score(1.0, label="fails"), (_score(1.2), _score(1.3, feasible=False)), plants=2
    )
    con = Console(width=250, record=True, color_system=None)
    con.print(robustness_table([held, fails], 2))
    rows = {ln.split("│")[1].strip(): ln for ln in con.export_text().splitlines() if "│" in ln}
    assert rows["holds"].rstrip(" │").endswith("yes")
    assert "no (below)" in rows["fails"] and "1/2" in rows["fails"]
    assert [ln for ln in reasons([held, fails]) if "fails" in ln]
