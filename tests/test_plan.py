"""Plan files: parsing, validation messages, the compact form and the round trip."""

from __future__ import annotations

import pytest
from problems import DEMO_PLANS

from optimizer.exceptions import PlanError
from optimizer.plan import Plan, Tier, load_plan, parse_plan

NAMES = ("a", "b", "c", "d")


def test_demo_plan_round_trips(demo) -> None:
    """``to_toml`` writes a file that loads back to an equal plan."""
    plan = load_plan(DEMO_PLANS / "three-tier.toml", demo.arm.joint_names)
    import tomllib

    again = parse_plan(tomllib.loads(plan.to_toml()), demo.arm.joint_names, "x.toml")
    assert again == plan
    assert plan.compact().startswith("[all] t1500 r1500 z0.8 | [upper_roll,elbow,")


@pytest.mark.parametrize(
    ("data", "key", "message"),
    [
        (
            {"tier": [{"joints": ["a", "zz"], "kp_t": 1, "kp_r": 1}]},
            "tier[0].joints",
            "unknown joint 'zz'",
        ),
        (
            {"tier": [{"joints": ["a", "a"], "kp_t": 1, "kp_r": 1}]},
            "tier[0].joints",
            "appears twice",
        ),
        ({"tier": [{"joints": "all", "kp_t": -1, "kp_r": 1}]}, "tier[0].kp_t", "must be >= 0"),
        (
            {"tier": [{"joints": "all", "kp_t": 1, "kp_r": 1, "gain": 3}]},
            "tier[0].gain",
            "unknown key",
        ),
        ({"tier": []}, "tier", "at least one"),
        (
            {
                "nested": True,
                "tier": [
                    {"joints": ["a", "b"], "kp_t": 1, "kp_r": 1},
                    {"joints": ["c"], "kp_t": 1, "kp_r": 1},
                ],
            },
            "tier",
            "declared nested",
        ),
        (
            {
                "tier": [
                    {"joints": "all", "kp_t": 1, "kp_r": 1},
                    {"joints": ["c"], "kp_t": 0, "kp_r": 0},
                ]
            },
            "tier",
            "would do nothing",
        ),
        ({"tier": [{"joints": 3, "kp_t": 1, "kp_r": 1}]}, "tier[0].joints", 'must be "all"'),
    ],
)
def test_plan_errors_name_the_key(data, key, message) -> None:
    """Each bad plan raises PlanError with the file, the key and the reason."""
    with pytest.raises(PlanError, match=message) as info:
        parse_plan(data, NAMES, "p.toml")
    assert info.value.key == key
    assert str(info.value).startswith(f"p.toml: {key}: ")


def test_unknown_joint_suggests_the_close_name() -> None:
    """A misspelt joint name gets a close-match suggestion."""
    with pytest.raises(PlanError, match="did you mean 'elbow'"):
        parse_plan({"tier": [{"joints": ["elbwo"], "kp_t": 1, "kp_r": 1}]}, ("elbow", "wrist"), "p")


def test_tier_validates_in_constructor() -> None:
    """A tier rejects a repeated joint and a non-positive damping ratio."""
    with pytest.raises(ValueError, match="twice"):
        Tier((0, 0), 1.0, 1.0, 0.7)
    with pytest.raises(ValueError, match="zeta"):
        Tier((0,), 1.0, 1.0, 0.0)
    with pytest.raises(ValueError, match="at least one tier"):
        Plan(())
