"""Malformed URDF files, actuator files and bench logs, generated (hypothesis).

Each example starts from a valid file of the planar test arm (or a short bench log) and
applies one to three mutations. The tool must then either accept it or refuse it in one
line that names the file, with no traceback, no crash, nothing on the C++ reader's
stderr, and no hang. Where a mutation certainly makes the input wrong (a link's mass
<= 0, an inertia that is not positive definite or breaks the triangle inequality, a zero
axis, a closed loop, a mimic joint, a truncated file, an unknown joint, a flat log...)
the example records it and acceptance fails the test: a silent acceptance is a defect
too. Generation is derandomised (CI sees the same examples each run); ``-m slow`` runs
many more. Counts by kind are printed at the end of the run (see ``fuzzing.py``).
"""

from __future__ import annotations

import copy
import itertools
import json
import math
import shutil
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import tomlkit
from fuzzing import tally
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st
from problems import DEMO, PLANAR, PLANAR_MJCF
from test_fuzz_inputs import VALUES, mutated

from optimizer.cli import main
from optimizer.exceptions import ProblemError
from optimizer.problem import load_problem

FUZZ = settings(
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow],
)

# --- URDF content -------------------------------------------------------------------

URDF_BASE = (PLANAR.parent / "arm.urdf").read_text()
MOVING = ("shoulder", "elbow", "wrist")  # the joints the problem file names
NUMBER_TEXT = st.one_of(
    st.sampled_from(
        [
            "-1",
            "0",
            "-0",
            "nan",
            "inf",
            "-inf",
            "abc",
            "",
            "1e308",
            "1e-300",
            "2 3",
            "1,5",
            "0x10",
            "1e400",
            "  7 ",
            "+3",
            "1_0",
            "٣",
        ]
    ),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-(10**6), 10**6).map(str),
)
VECTOR_TEXT = st.one_of(
    st.sampled_from(
        [
            "1 2",
            "a b c",
            "nan 0 0",
            "0 0 0",
            "1e308 0 0",
            "",
            "0 0 1 2",
            "0,0,1",
            "inf 0 0",
            "0 -1 0",
            "1 0 0",
            "0.1 0.2 0.3",
        ]
    ),
    st.lists(st.floats(-10, 10), min_size=3, max_size=3).map(lambda v: " ".join(map(repr, v))),
)
INERTIA_KEYS = ("ixx", "iyy", "izz", "ixy", "ixz", "iyz")


def _number(text: str) -> float | None:
    """The value a strict reader takes from ``text``, or None when it is not one number."""
    try:
        v = float(text)
    except ValueError:
        return None
    return v if math.isfinite(v) else None


def _inertia_bad(el: ET.Element) -> bool:
    """True when the <inertia> is certainly not physical (clear margins; borderline cases
    are left to the tool)."""
    vals = {k: _number(el.get(k, "0")) for k in INERTIA_KEYS}
    if any(v is None for v in vals.values()):
        return True
    v = {k: float(x) for k, x in vals.items() if x is not None}
    m = np.array(
        [
            [v["ixx"], v["ixy"], v["ixz"]],
            [v["ixy"], v["iyy"], v["iyz"]],
            [v["ixz"], v["iyz"], v["izz"]],
        ]
    )
    scale = max(1e-12, float(np.abs(m).max()))
    ev = np.linalg.eigvalsh(m)
    if ev[0] < -1e-6 * scale:
        return True
    # principal moments: each at most the sum of the other two (perpendicular-axis theorem)
    return bool(ev[2] > (ev[0] + ev[1]) * 1.01 + 1e-9 * scale)


def _is_tree(root: ET.Element) -> bool:
    """True when the joints join the named links into one tree (every joint has a parent
    and a child that exist, no link has two parents, one root, no cycle)."""
    links = [ln.get("name") for ln in root.findall("link")]
    parent_of: dict[str, str] = {}
    for j in root.findall("joint"):
        p, c = j.find("parent"), j.find("child")
        if p is None or c is None:
            return False
        pl, cl = p.get("link"), c.get("link")
        if pl not in links or cl not in links or cl in parent_of:
            return False
        parent_of[str(cl)] = str(pl)
    roots = [ln for ln in links if ln not in parent_of]
    if len(roots) != 1 or len(set(links)) != len(links):
        return False
    for start in parent_of:  # every chain of parents ends at the root
        seen, cur = set(), start
        while cur in parent_of:
            if cur in seen:
                return False
            seen.add(cur)
            cur = parent_of[cur]
    return True


def _certainly_wrong(root: ET.Element) -> bool:
    """The test's own judgement of the final URDF (independent of the tool's checker):
    True when it certainly is not a physical tree of known joints that the problem file
    can use. Borderline numbers (e.g. an inertia on the edge of the triangle inequality)
    count as not certainly wrong."""
    if not _is_tree(root):
        return True
    names = [j.get("name") for j in root.findall("joint")]
    if "" in names or None in names or len(set(names)) != len(names):
        return True
    for j in root.findall("joint"):
        t = j.get("type")
        if t not in ("revolute", "continuous", "prismatic", "fixed") or j.find("mimic") is not None:
            return True
        if j.get("name") == "shoulder" and t == "fixed":
            return True
    if "shoulder" not in names:  # the problem file's [actuators.shoulder]
        return True
    for el in root.iter():
        if el.tag not in ("origin", "axis"):
            continue
        for attr in ("xyz", "rpy") if el.tag == "origin" else ("xyz",):
            raw = el.get(attr)
            if raw is None:
                continue
            nums = [_number(p) for p in raw.replace(",", " ,").split()]
            if len(nums) != 3 or any(n is None for n in nums):
                return True
            if el.tag == "axis" and all(n == 0 for n in nums):
                return True
    for inertial in root.iter("inertial"):
        mass = inertial.find("mass")
        m = _number(mass.get("value", "")) if mass is not None else 0.0
        if m is None or m < 0:
            return True
        inertia = inertial.find("inertia")
        if m > 0 and (inertia is None or _inertia_bad(inertia)):
            return True
    return False


@st.composite
def urdf_case(draw: Any) -> tuple[str, list[str], bool]:
    """(URDF text, mutations made, certainly-wrong flag)."""
    root = ET.fromstring(URDF_BASE)
    done: list[str] = []
    wrong = False
    for _ in range(draw(st.integers(1, 3))):
        links = root.findall("link")
        joints = root.findall("joint")
        massive = [ln for ln in links if ln.find("inertial") is not None]
        kind = draw(
            st.sampled_from(
                [
                    "mass",
                    "inertia",
                    "vector",
                    "type",
                    "limit",
                    "drop",
                    "loop",
                    "dangling",
                    "mimic",
                    "duplicate",
                    "rename",
                    "junk",
                    "root",
                ]
            )
        )
        if kind == "mass" and massive:
            el = draw(st.sampled_from(massive)).find("inertial/mass")
            if el is not None:
                text = draw(NUMBER_TEXT)
                el.set("value", text)
                done.append(f"mass {text!r}")
        elif kind == "inertia" and massive:
            el = draw(st.sampled_from(massive)).find("inertial/inertia")
            if el is not None:
                key = draw(st.sampled_from(INERTIA_KEYS))
                text = draw(NUMBER_TEXT)
                el.set(key, text)
                done.append(f"inertia {key}={text!r}")
        elif kind == "vector":
            owners = [e for e in root.iter() if e.tag in ("origin", "axis")]
            el = draw(st.sampled_from(owners))
            attr = draw(st.sampled_from(["xyz", "rpy"])) if el.tag == "origin" else "xyz"
            text = draw(VECTOR_TEXT)
            el.set(attr, text)
            done.append(f"{el.tag} {attr}={text!r}")
        elif kind == "type":
            j = draw(st.sampled_from(joints))
            t = draw(st.sampled_from(["revolute", "continuous", "prismatic", "fixed",
                                      "floating", "planar", "bogus", ""]))  # fmt: skip
            j.set("type", t)
            done.append(f"type {j.get('name')}={t!r}")
        elif kind == "limit":
            lim = [j.find("limit") for j in joints if j.find("limit") is not None]
            if lim:
                el = draw(st.sampled_from(lim))
                key = draw(st.sampled_from(["effort", "velocity", "lower", "upper"]))
                el.set(key, draw(NUMBER_TEXT))
                done.append(f"limit {key}")
        elif kind == "drop":
            what = draw(st.sampled_from(["inertial", "mass", "inertia", "origin", "axis",
                                         "limit", "parent", "child"]))  # fmt: skip
            holders = [p for p in root.iter() for c in p if c.tag == what]
            if holders:
                p = draw(st.sampled_from(holders))
                p.remove(p.find(what))  # type: ignore[arg-type]
                done.append(f"drop <{what}>")
        elif kind == "loop":  # a joint whose child already has a parent, or is the root
            j = draw(st.sampled_from(joints))
            child = j.find("child")
            if child is not None:
                others = [ln.get("name") for ln in links if ln.get("name") != child.get("link")]
                child.set("link", draw(st.sampled_from(others)))
                done.append("closed loop")  # judged on the final tree (two may undo)
        elif kind == "dangling":
            j = draw(st.sampled_from(joints))
            el = j.find(draw(st.sampled_from(["parent", "child"])))
            if el is not None:
                el.set("link", draw(st.sampled_from(["nowhere", "", "upper "])))
                done.append("dangling link")
        elif kind == "mimic":
            j = draw(st.sampled_from([j for j in joints if j.get("type") != "fixed"] or joints))
            ET.SubElement(j, "mimic", joint=draw(st.sampled_from(MOVING)), multiplier="1")
            done.append("mimic")
        elif kind == "duplicate":
            el = copy.deepcopy(draw(st.sampled_from(links[1:] + joints)))
            root.append(el)
            done.append(f"duplicate <{el.tag}>")
        elif kind == "rename":  # the problem file names 'shoulder' (its own actuator table)
            j = draw(st.sampled_from([j for j in joints if j.get("name") in MOVING] or joints))
            if j.get("name") in MOVING:
                j.set("name", draw(st.sampled_from(["Shoulder", "x", "elbow2", ""])))
                done.append("renamed joint")
        elif kind == "junk":
            host = draw(st.sampled_from(links + joints))
            ET.SubElement(host, draw(st.sampled_from(["foo", "gazebo", "transmission"])))
            done.append("unknown element")
        elif kind == "root":
            root.tag = draw(st.sampled_from(["robots", "sdf", "Robot"]))
            wrong = True
            done.append("root tag")
    wrong |= _certainly_wrong(root)
    text = ET.tostring(root, encoding="unicode")
    how = draw(st.integers(0, 11))
    if how == 0:  # cut short: not well-formed
        text = text[: draw(st.integers(0, len(text) - 12))]
        wrong = True
        done.append("truncated")
    elif how == 1:
        text = text.replace("<robot", "<robot " + draw(st.sampled_from(['a="1" a="2"', "<"])), 1)
        wrong = True
        done.append("broken tag")
    return text, done, wrong


def _planar_in(d: Path) -> Path:
    for f in PLANAR.parent.iterdir():
        if f.is_file():
            shutil.copy(f, d / f.name)
    return d / PLANAR.name


@pytest.fixture(scope="module")
def planar_copy(tmp_path_factory) -> Path:
    """The planar problem in a folder of its own; the URDF tests overwrite its URDF."""
    return _planar_in(tmp_path_factory.mktemp("fuzz-urdf"))


@pytest.fixture(scope="module")
def planar_for_actuators(tmp_path_factory) -> Path:
    """The planar problem, untouched, for the actuator-file tests."""
    return _planar_in(tmp_path_factory.mktemp("fuzz-actuators"))


def _one_line_naming(err: str, *names: str) -> None:
    assert "\n" not in err.strip(), err
    assert "Traceback" not in err
    assert any(n in err for n in names), (names, err)


def _check_urdf(planar_copy: Path, capfd, case: tuple[str, list[str], bool]) -> None:
    text, done, wrong = case
    urdf = planar_copy.parent / "arm.urdf"
    urdf.write_text(text)
    capfd.readouterr()
    try:
        load_problem(planar_copy)
    except ProblemError as err:
        event("URDF: refused")
        tally("URDF", "refused")
        _one_line_naming(str(err), str(urdf), str(planar_copy))
        _, cerr = capfd.readouterr()
        assert not cerr.strip(), (done, cerr)  # the C++ reader's noise stays off the terminal
        return
    event("URDF: accepted")
    tally("URDF", "accepted")
    assert not wrong, f"accepted a certainly wrong URDF: {done}"
    assert not capfd.readouterr().err.strip()


@settings(FUZZ, max_examples=150)
@given(case=urdf_case())
def test_malformed_urdf_content_is_refused_cleanly(planar_copy, capfd, case):
    """A mutated URDF loads (and only if it is still a physical tree of 1-DoF joints),
    or is refused in one line naming it."""
    _check_urdf(planar_copy, capfd, case)


@pytest.mark.slow
@settings(FUZZ, max_examples=1500)
@given(case=urdf_case())
def test_many_malformed_urdf_files(planar_copy, capfd, case):
    """The same property over many more generated URDF files."""
    _check_urdf(planar_copy, capfd, case)


def test_the_unmutated_urdf_round_trip_loads(planar_copy):
    """The base URDF written back by ElementTree loads (the property can pass)."""
    (planar_copy.parent / "arm.urdf").write_text(
        ET.tostring(ET.fromstring(URDF_BASE), encoding="unicode")
    )
    assert load_problem(planar_copy).arm.n == 3


# --- MJCF content -----------------------------------------------------------------

MJCF_REFUSED = [
    '<include file="other.xml"/>',
    '<equality><joint joint1="elbow" joint2="wrist"/></equality>',
    '<tendon><fixed name="t"><joint joint="elbow" coef="1"/></fixed></tendon>',
    "<spaceship/>",
]


@st.composite
def mjcf_case(draw: Any) -> tuple[str, list[str], bool]:
    """(MJCF text, mutations made, certainly-wrong flag)."""
    root = ET.fromstring(PLANAR_MJCF)
    done: list[str] = []
    wrong = False
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["number", "vector", "drop", "type", "refused", "joint",
                                     "compiler", "junk"]))  # fmt: skip
        elements = [e for e in root.iter() if e is not root]
        inertials, joints = list(root.iter("inertial")), list(root.iter("joint"))
        bodies = list(root.iter("body"))
        if not elements:
            break
        if kind == "number" and inertials:
            el = draw(st.sampled_from(inertials))
            text = draw(NUMBER_TEXT)
            el.set("mass", text)
            done.append(f"mass {text!r}")
        elif kind == "vector":
            el = draw(st.sampled_from(elements))
            attr = draw(st.sampled_from(["pos", "axis", "quat", "euler", "diaginertia",
                                         "range", "fullinertia", "xyaxes", "zaxis"]))  # fmt: skip
            text = draw(VECTOR_TEXT)
            el.set(attr, text)
            done.append(f"<{el.tag}> {attr}={text!r}")
        elif kind == "drop":
            parents = [p for p in root.iter() for _ in p]
            p = draw(st.sampled_from(parents))
            c = draw(st.sampled_from(list(p)))
            p.remove(c)
            done.append(f"drop <{c.tag}>")
        elif kind == "type" and joints:
            j = draw(st.sampled_from(joints))
            t = draw(st.sampled_from(["hinge", "slide", "ball", "free", "bogus", ""]))
            j.set("type", t)
            done.append(f"joint type {t!r}")
        elif kind == "refused":
            root.append(ET.fromstring(draw(st.sampled_from(MJCF_REFUSED))))
            done.append("refused element")
        elif kind == "joint" and bodies:
            body = draw(st.sampled_from(bodies))
            ET.SubElement(body, draw(st.sampled_from(["joint", "freejoint"])), name="extra")
            done.append("second joint")
        elif kind == "compiler":
            comp = root.find("compiler")
            if comp is None:
                comp = ET.Element("compiler")
                root.insert(0, comp)
            key = draw(st.sampled_from(["angle", "eulerseq", "inertiafromgeom"]))
            comp.set(key, draw(st.sampled_from(["degree", "radian", "zyx", "XYZ", "true",
                                                "auto", "", "xx"])))  # fmt: skip
            done.append(f"compiler {key}")
        elif kind == "junk":
            host = draw(st.sampled_from(elements))
            host.set(draw(st.sampled_from(["class", "childclass", "ref", "damping"])), "1")
            done.append("attribute")
    for el in root.iter("inertial"):  # judged on the final document (a later change may undo)
        v = _number(el.get("mass", ""))
        wrong |= v is None or v <= 0
    wrong |= any(j.get("type", "hinge") not in ("hinge", "slide") for j in root.iter("joint"))
    wrong |= any(c.tag in ("include", "equality", "tendon", "spaceship") for c in root)
    wrong |= any(
        len([j for j in b if j.tag in ("joint", "freejoint")]) > 1
        or b.find("freejoint") is not None
        for b in root.iter("body")
    )
    text = ET.tostring(root, encoding="unicode")
    if draw(st.integers(0, 11)) == 0:
        text = text[: draw(st.integers(0, len(text) - 12))]
        wrong = True
        done.append("truncated")
    return text, done, wrong


@pytest.fixture(scope="module")
def planar_mjcf(tmp_path_factory) -> Path:
    """The planar problem with its arm as MJCF (tests/problems.py), in its own folder."""
    prob = _planar_in(tmp_path_factory.mktemp("fuzz-mjcf"))
    prob.write_text(prob.read_text().replace('urdf = "arm.urdf"', 'mjcf = "arm.xml"'))
    (prob.parent / "arm.xml").write_text(PLANAR_MJCF)
    load_problem(prob)  # the base loads
    return prob


def _check_mjcf(planar_mjcf: Path, capfd, case: tuple[str, list[str], bool]) -> None:
    text, done, wrong = case
    path = planar_mjcf.parent / "arm.xml"
    path.write_text(text)
    capfd.readouterr()
    try:
        load_problem(planar_mjcf)
    except ProblemError as err:
        event("MJCF: refused")
        tally("MJCF", "refused")
        _one_line_naming(str(err), str(path), str(planar_mjcf))
        assert not capfd.readouterr().err.strip()
        return
    event("MJCF: accepted")
    tally("MJCF", "accepted")
    assert not wrong, f"accepted a certainly wrong MJCF: {done}"
    assert not capfd.readouterr().err.strip()


@settings(FUZZ, max_examples=80)
@given(case=mjcf_case())
def test_malformed_mjcf_is_refused_cleanly(planar_mjcf, capfd, case):
    """A mutated MJCF loads or is refused in one line naming it; never a crash."""
    _check_mjcf(planar_mjcf, capfd, case)


@pytest.mark.slow
@settings(FUZZ, max_examples=800)
@given(case=mjcf_case())
def test_many_malformed_mjcf_files(planar_mjcf, capfd, case):
    """The same property over many more generated MJCF files."""
    _check_mjcf(planar_mjcf, capfd, case)


# --- actuator files ---------------------------------------------------------------

VALID_ACTUATORS = {
    "description": "a faster elbow",
    "actuators": {
        "elbow": {
            "model": "second_order",
            "natural_hz": 25.0,
            "damping_ratio": 0.7,
            "delay_ms": 1.5,
            "coulomb_nm": 0.3,
        },
        "wrist": {"corner_hz": 80.0, "armature_kgm2": 0.002},
    },
}


@st.composite
def actuator_case(draw: Any) -> tuple[dict, list[str], bool]:
    """A mutated actuator file; also unknown joints, 'default', a non-table entry."""
    doc, done = draw(mutated(VALID_ACTUATORS))
    wrong = False
    extra = draw(st.sampled_from(["none", "none", "unknown joint", "default", "not a table",
                                  "no joints", "model mix"]))  # fmt: skip
    acts = doc.get("actuators")
    if isinstance(acts, dict):
        if extra == "unknown joint":
            acts["knee"] = {"corner_hz": 10.0}
            wrong = True
        elif extra == "default":
            acts["default"] = {"corner_hz": 10.0}
            wrong = True
        elif extra == "not a table":
            acts["elbow"] = v = draw(VALUES)
            wrong = not isinstance(v, dict) or bool(v)  # {} is an empty table: valid
        elif extra == "no joints":
            acts.clear()
            wrong = True
        elif extra == "model mix":  # second-order keys on a first-order model
            acts["wrist"] = {"model": "first_order", "natural_hz": 20.0}
            wrong = True
        done.append(extra)
    return doc, done, wrong


def _check_actuators(planar_for_actuators: Path, capfd, case: tuple[dict, list[str], bool]) -> None:
    doc, done, wrong = case
    try:
        text = tomlkit.dumps(doc)
    except Exception:
        text = None
    assume(text is not None)
    path = planar_for_actuators.parent / "faster.toml"
    path.write_text(text)  # type: ignore[arg-type]
    capfd.readouterr()
    try:
        load_problem(planar_for_actuators, actuator_files=[path])
    except ProblemError as err:
        event("actuator file: refused")
        tally("actuator file", "refused")
        _one_line_naming(str(err), str(path))  # the actuator file, not the problem file
        return
    event("actuator file: accepted")
    tally("actuator file", "accepted")
    assert not wrong, f"accepted a certainly wrong actuator file: {done}"


@settings(FUZZ, max_examples=120)
@given(case=actuator_case())
def test_malformed_actuator_files_are_refused_cleanly(planar_for_actuators, capfd, case):
    """A mutated actuator file applies, or is refused in one line naming that file."""
    _check_actuators(planar_for_actuators, capfd, case)


@pytest.mark.slow
@settings(FUZZ, max_examples=1000)
@given(case=actuator_case())
def test_many_malformed_actuator_files(planar_for_actuators, capfd, case):
    """The same property over many more generated actuator files."""
    _check_actuators(planar_for_actuators, capfd, case)


def test_the_unmutated_actuator_file_applies(planar_for_actuators, tmp_path):
    """The base actuator file applies and changes the elbow (the property can pass)."""
    path = tmp_path / "faster.toml"
    path.write_text(tomlkit.dumps(VALID_ACTUATORS))
    prob = load_problem(planar_for_actuators, actuator_files=[path])
    assert "25" in prob.actuators[prob.arm.joint_names.index("elbow")].model.describe()


# --- bench logs ---------------------------------------------------------------------

BENCH = DEMO.parent / "bench-logs"
SWEEP = [ln for ln in (BENCH / "elbow-sweep.csv").read_text().splitlines() if ln[:1] != "#"]
STEP = [ln for ln in (BENCH / "wrist_pitch-step.csv").read_text().splitlines() if ln[:1] != "#"]
STEP = STEP[:1] + STEP[1:401:2]  # 0.4 s at 500 Hz: short enough to fit quickly
CELL = st.one_of(
    st.sampled_from(
        [
            "",
            "nan",
            "inf",
            "-inf",
            "abc",
            "1e308",
            "-1e308",
            "1e-320",
            "0",
            "-5",
            " ",
            "1;2",
            '"3"',
            "0x1",
        ]
    ),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
)


@st.composite
def log_case(draw: Any) -> tuple[bytes, list[str], bool]:
    """A mutated bench log (frequency or time response) as bytes."""
    lines = list(draw(st.sampled_from([SWEEP, STEP])))
    rows = [ln.split(",") for ln in lines]
    done: list[str] = []
    wrong = False
    for _ in range(draw(st.integers(1, 3))):
        kind = draw(st.sampled_from(["cell", "column", "header", "order", "short", "repeat",
                                     "extra", "flat", "scale", "comment"]))  # fmt: skip
        body = len(rows) - 1
        if kind == "cell" and body > 0:
            r, c = draw(st.integers(1, body)), draw(st.integers(0, len(rows[0]) - 1))
            if c < len(rows[r]):
                text = draw(CELL)
                rows[r][c] = text
                wrong |= _number(text) is None
                done.append(f"cell {text!r}")
        elif kind == "column":
            c = draw(st.integers(0, len(rows[0]) - 1))
            rows = [row[:c] + row[c + 1 :] for row in rows]
            wrong = True
            done.append("column dropped")
        elif kind == "header":
            c = draw(st.integers(0, len(rows[0]) - 1))
            rows[0][c] = draw(st.sampled_from(["freq", "", "time_ms", "phase_rad"]))
            wrong = True
            done.append("header renamed")
        elif kind == "order" and body > 2:
            i, j = sorted(draw(st.lists(st.integers(1, body), min_size=2, max_size=2, unique=True)))
            rows[i], rows[j] = rows[j], rows[i]
            done.append("rows swapped")  # judged on the final rows (two may undo)
        elif kind == "short":
            rows = rows[: 1 + draw(st.integers(0, 3))]
            wrong = True
            done.append("too few rows")
        elif kind == "repeat" and body > 0:
            r = draw(st.integers(1, body))
            rows.insert(r, list(rows[r]))
            wrong = True  # a repeated time or frequency
            done.append("row repeated")
        elif kind == "extra" and body > 0:
            rows[draw(st.integers(1, body))].append("9")
            done.append("extra cell")
        elif kind == "flat":  # nothing to identify: 0 dB and 0 deg, or no measured torque
            freq = rows[0][0].startswith("freq")
            for row in rows[1:]:
                if len(row) == 3:
                    row[1:] = ["0", "0"] if freq else [row[1], "0"]
            wrong = True
            done.append("flat response")
        elif kind == "scale" and body > 0:  # an absurd unit on one column
            c = draw(st.integers(0, len(rows[0]) - 1))
            f = draw(st.sampled_from([1e-300, 1e300, -1.0, 0.0]))
            for row in rows[1:]:
                v = _number(row[c]) if c < len(row) else None
                if v is not None:
                    row[c] = repr(v * f)
            done.append(f"column x{f:g}")
        elif kind == "comment":
            rows.insert(draw(st.integers(0, len(rows))), ["# a comment"])
            done.append("comment line")
    firsts = [_number(r[0]) for r in rows[1:] if r and not r[0].startswith("#")]
    if all(x is not None for x in firsts):
        wrong |= any(b <= a for a, b in itertools.pairwise(firsts))  # type: ignore[operator]
    data = ("\n".join(",".join(r) for r in rows) + "\n").encode()
    if draw(st.integers(0, 14)) == 0:
        data = data[:20] + b"\xff\xfe\x00" + data[20:]
        wrong = True
        done.append("not UTF-8")
    return data, done, wrong


def _check_log(folder: Path, capfd, case: tuple[bytes, list[str], bool]) -> None:
    data, done, wrong = case
    log = folder / "bench.csv"
    log.write_bytes(data)
    out_json = folder / "fit.json"
    out_json.unlink(missing_ok=True)
    capfd.readouterr()
    rc = main(["fit", str(log), "--no-plot", "--json", str(out_json)])
    _, err = capfd.readouterr()
    assert rc in (0, 2), (done, rc, err)
    assert "Traceback" not in err
    if rc == 2:
        event("bench log: refused")
        tally("bench log", "refused")
        assert err.count("\n") == 1 and err.startswith(f"tierplan: error: {log}: "), (done, err)
        assert not out_json.exists()
        return
    event("bench log: accepted")
    tally("bench log", "accepted")
    assert not wrong, f"fitted a certainly wrong log: {done}"

    def strict(c: str) -> float:
        raise AssertionError(f"{c} in the fit's JSON")

    json.loads(out_json.read_text(), parse_constant=strict)  # strict JSON: no NaN/Infinity


@pytest.fixture(scope="module")
def log_folder(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("fuzz-logs")


@settings(FUZZ, max_examples=100)
@given(case=log_case())
def test_malformed_bench_logs_are_refused_cleanly(log_folder, capfd, case):
    """A mutated bench log is fitted (strict JSON written) or refused in one line naming it."""
    _check_log(log_folder, capfd, case)


@pytest.mark.slow
@settings(FUZZ, max_examples=600)
@given(case=log_case())
def test_many_malformed_bench_logs(log_folder, capfd, case):
    """The same property over many more generated bench logs."""
    _check_log(log_folder, capfd, case)


@pytest.mark.parametrize(("key", "value"), [("damping_ratio", 1e308), ("natural_hz", 1e300)])
def test_absurd_model_parameters_are_refused_naming_their_key(
    planar_for_actuators, tmp_path, key, value
):
    """Found by the generated actuator files: damping_ratio = 1e308 overflowed in the
    model's arithmetic (a traceback). Refused now, naming that key."""
    doc = copy.deepcopy(VALID_ACTUATORS)
    doc["actuators"]["elbow"][key] = value
    path = tmp_path / "absurd.toml"
    path.write_text(tomlkit.dumps(doc))
    with pytest.raises(ProblemError, match=rf"{path}: actuators\.elbow\.{key}: must be at most"):
        load_problem(planar_for_actuators, actuator_files=[path])
