"""Malformed problem and plan files, generated (hypothesis): every one is refused cleanly.

Each example starts from a valid file and applies one to three mutations: drop a key or a
whole table, put a value of the wrong type or an extreme or non-finite number in place of
one, add an unknown key, empty the trajectory list, duplicate a trajectory name, set an
absurd control rate. The file must then either load (the mutation kept it valid) or give
exit code 2 with one line naming the file and the key, and no traceback. Generation is
derandomised, so CI sees the same examples every run; ``-m slow`` runs many more.
"""

from __future__ import annotations

import contextlib
import copy
import io
import math
import shutil
from pathlib import Path
from typing import Any

import pytest
import tomlkit
from fuzzing import tally
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st
from problems import PLANAR, PLANAR_PLANS

from optimizer.cli import main
from optimizer.exceptions import PlanError
from optimizer.plan import load_plan
from optimizer.tomlio import tomllib

VALID_PROBLEM = tomllib.loads(PLANAR.read_text())
VALID_PLAN = tomllib.loads((PLANAR_PLANS / "two-tier.toml").read_text())
JOINTS = ("shoulder", "elbow", "wrist")

EXTREME = st.sampled_from(
    [0, -1, 1e308, -1e308, 1e-300, math.nan, math.inf, -math.inf, 10**15, -(10**15), 1e9]
)
WORDS = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_-. 0123456789", min_size=0, max_size=10)
VALUES = st.one_of(
    EXTREME,
    WORDS,
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True, allow_infinity=True),
    st.lists(st.floats(-1e3, 1e3), max_size=4),
    st.lists(WORDS, max_size=3),
    st.dictionaries(st.sampled_from(["a", "kp", "x"]), st.integers(0, 9), max_size=2),
)


def _paths(node: Any, prefix: tuple = ()) -> list[tuple]:
    """Every key path in a parsed TOML document (list items by index)."""
    out = []
    if isinstance(node, dict):
        for k, v in node.items():
            out.append((*prefix, k))
            out += _paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            if isinstance(v, dict):
                out += _paths(v, (*prefix, i))
    return out


def _tables(node: Any, prefix: tuple = ()) -> list[tuple]:
    out = [prefix] if isinstance(node, dict) else []
    items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else []
    for k, v in items:
        if isinstance(v, dict | list):
            out += _tables(v, (*prefix, k))
    return out


def _get(doc: Any, path: tuple) -> Any:
    for k in path:
        doc = doc[k]
    return doc


@st.composite
def mutated(draw: Any, base: dict) -> tuple[dict, list[str]]:
    """A copy of ``base`` with 1–3 mutations, and what they were (for the event log)."""
    doc = copy.deepcopy(base)
    done = []
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["drop", "replace", "unknown", "trajectories", "rate"]))
        paths = _paths(doc)
        if kind == "drop" and paths:
            p = draw(st.sampled_from(paths))
            parent = _get(doc, p[:-1])
            if isinstance(parent, dict) and p[-1] in parent:
                del parent[p[-1]]
                done.append(f"drop {'.'.join(map(str, p))}")
        elif kind == "replace" and paths:
            p = draw(st.sampled_from(paths))
            parent = _get(doc, p[:-1])
            if isinstance(parent, dict) and p[-1] in parent:
                parent[p[-1]] = draw(VALUES)
                done.append(f"replace {'.'.join(map(str, p))}")
        elif kind == "unknown":
            tables = _tables(doc)
            t = _get(doc, draw(st.sampled_from(tables)))
            if isinstance(t, dict):
                t[draw(st.sampled_from(["colour", "kp_tt", "Rate_hz", "extra"]))] = draw(VALUES)
                done.append("unknown key")
        elif kind == "trajectories" and "trajectory" in doc and isinstance(doc["trajectory"], list):
            how = draw(st.sampled_from(["empty", "duplicate"]))
            if how == "empty":
                doc["trajectory"] = []
            elif doc["trajectory"]:
                doc["trajectory"].append(copy.deepcopy(doc["trajectory"][0]))
            done.append(f"trajectories {how}")
        elif kind == "rate" and isinstance(doc.get("control"), dict):
            doc["control"]["rate_hz"] = draw(st.sampled_from([0.0, -5.0, 1e-3, 1.0, 1e7, math.nan]))
            done.append("absurd rate")
    return doc, done


def _dump(doc: dict) -> str | None:
    try:
        return tomlkit.dumps(doc)
    except Exception:  # a shape TOML cannot write (e.g. an empty array of tables): not a test
        return None


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("fuzz")
    shutil.copy(PLANAR.parent / "arm.urdf", d / "arm.urdf")
    return d


def _check_problem(folder: Path, doc: dict, what: list[str]) -> None:
    text = _dump(doc)
    assume(text is not None)
    path = folder / "problem.toml"
    path.write_text(text)
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        rc = main(["check", str(path)])
    msg = err.getvalue()
    assert rc in (0, 2), (what, rc, msg)
    assert "Traceback" not in msg
    if rc == 0:
        event("problem: still valid")
        tally("problem file", "accepted")
        return
    event("problem: rejected")
    tally("problem file", "refused")
    assert msg.count("\n") == 1, (what, msg)
    head = f"tierplan: error: {path}: "
    assert msg.startswith(head), (what, msg)
    key, _, reason = msg[len(head) :].partition(": ")
    assert key and reason.strip(), (what, msg)  # a key, then what is wrong


FUZZ = settings(
    max_examples=120,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)


@FUZZ
@given(case=mutated(VALID_PROBLEM))
def test_malformed_problem_files_are_refused_cleanly(folder, case):
    """A mutated problem file loads, or exits 2 with one line 'file: key: reason'."""
    _check_problem(folder, *case)


@pytest.mark.slow
@settings(FUZZ, max_examples=1500)
@given(case=mutated(VALID_PROBLEM))
def test_many_malformed_problem_files(folder, case):
    """The same property over many more generated files."""
    _check_problem(folder, *case)


def test_the_unmutated_problem_still_loads(folder):
    """The base document, written back by the same TOML writer, is valid (the property can pass)."""
    path = folder / "problem.toml"
    path.write_text(tomlkit.dumps(VALID_PROBLEM))
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["check", str(path)]) == 0


def _check_plan(folder: Path, doc: dict, what: list[str]) -> None:
    text = _dump(doc)
    assume(text is not None)
    path = folder / "plan.toml"
    path.write_text(text)
    try:
        load_plan(path, JOINTS)
    except PlanError as err:
        event("plan: rejected")
        tally("plan file", "refused")
        msg = str(err)
        assert "\n" not in msg
        assert msg.startswith(f"{path}: "), (what, msg)
        key, _, reason = msg[len(f"{path}: ") :].partition(": ")
        assert key and reason.strip(), (what, msg)
        return
    event("plan: still valid")
    tally("plan file", "accepted")


@FUZZ
@given(case=mutated(VALID_PLAN))
def test_malformed_plan_files_are_refused_cleanly(folder, case):
    """A mutated plan file loads, or raises PlanError 'file: key: reason' in one line."""
    _check_plan(folder, *case)


def test_bad_plan_through_the_cli_is_exit_2(folder, capsys):
    """The CLI maps a plan error to exit 2 and one line."""
    path = folder / "bad-plan.toml"
    path.write_text('label = "x"\n[[tier]]\njoints = "all"\nkp_t = -1.0\nkp_r = 1.0\nzeta = 0.7\n')
    assert main(["score", str(PLANAR), "--plan", str(path), "--no-margin"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "kp_t" in err and "Traceback" not in err
