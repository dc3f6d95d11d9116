"""URDF files are untrusted XML: declarations, oversize files and mesh paths are refused or ignored."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap

import pytest
from problems import PLANAR

from optimizer.arm import MAX_URDF_BYTES
from optimizer.cli import main
from optimizer.exceptions import ProblemError
from optimizer.problem import load_problem


def _copy(tmp_path, urdf_text: str | None = None):
    """The planar problem in tmp_path, with its URDF replaced by ``urdf_text`` when given."""
    for f in PLANAR.parent.iterdir():
        if f.is_file():
            shutil.copy(f, tmp_path / f.name)
    prob = tmp_path / PLANAR.name
    urdf = next(tmp_path.glob("*.urdf"))
    if urdf_text is not None:
        urdf.write_text(urdf_text)
    return prob, urdf


def _with(tmp_path, before_robot: str = "", inside_link: str = ""):
    _, urdf = _copy(tmp_path)
    text = urdf.read_text()
    if before_robot:
        text = text.replace("<robot", before_robot + "\n<robot", 1)
    if inside_link:
        i = text.index("<link")
        j = text.index(">", i) + 1
        text = text[:j] + inside_link + text[j:]
    return _copy(tmp_path, text)


@pytest.mark.parametrize(
    "decl",
    [
        '<!DOCTYPE robot [<!ENTITY secret SYSTEM "file:///etc/passwd">]>',
        '<!DOCTYPE robot [<!ENTITY a "aaaaaaaaaa"><!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;&a;&a;">]>',
        '<!doctype robot SYSTEM "http://127.0.0.1:9/evil.dtd">',
    ],
    ids=["external-entity", "entity-expansion", "external-dtd"],
)
def test_declarations_are_refused_before_parsing(tmp_path, capsys, decl):
    """Any DOCTYPE or ENTITY declaration gives a one-line error naming the URDF, exit 2."""
    prob, urdf = _with(tmp_path, before_robot=decl)
    with pytest.raises(ProblemError, match=r"DOCTYPE.*ENTITY.*refused"):
        load_problem(prob, check_reach=False)
    assert main(["check", str(prob)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(urdf) in err and "Traceback" not in err


def test_oversize_urdf_is_refused_without_reading_it(tmp_path):
    """A URDF over the size cap is refused from its size alone (a sparse file: nothing read)."""
    prob, urdf = _copy(tmp_path)
    with open(urdf, "r+b") as f:
        f.truncate(MAX_URDF_BYTES + 1)
    with pytest.raises(ProblemError, match="the limit for a URDF is 8 MiB"):
        load_problem(prob, check_reach=False)


def test_not_xml_is_one_line(tmp_path):
    """Broken XML names the file and the parser's position."""
    prob, _ = _copy(tmp_path, "<robot name='x'><link name='a'></robot>")
    with pytest.raises(ProblemError, match="not well-formed XML"):
        load_problem(prob, check_reach=False)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="needs named pipes (POSIX)")
def test_mesh_paths_are_never_opened(tmp_path):
    """A mesh naming a FIFO is not opened: opening one for reading would block, loading does not.

    The load runs in a child process with a timeout, so a regression fails instead of hanging.
    """
    fifo = tmp_path / "trap.stl"
    os.mkfifo(fifo)
    mesh = (
        f'<visual><geometry><mesh filename="{fifo}"/></geometry></visual>'
        f'<collision><geometry><mesh filename="file://{fifo}"/></geometry></collision>'
    )
    prob, _ = _with(tmp_path, inside_link=mesh)
    code = textwrap.dedent(
        f"""
        from optimizer.problem import load_problem
        p = load_problem({str(prob)!r})
        print(p.arm.n)
        """
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, timeout=120
    )
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "3"


# -- content: physically meaningless or unsupported models --------------------------
def _edit(tmp_path, old: str, new: str):
    _, urdf = _copy(tmp_path)
    text = urdf.read_text()
    assert old in text, old
    return _copy(tmp_path, text.replace(old, new, 1))


@pytest.mark.parametrize(
    ("old", "new", "why"),
    [
        ('<mass value="2.0"/>', '<mass value="heavy"/>', "is not 1 number"),
        ('<mass value="2.0"/>', '<mass value="-2.0"/>', "mass must be > 0"),
        ('<mass value="2.0"/>', '<mass value="nan"/>', "finite"),
        ('ixx="0.001"', 'ixx="-0.001"', "not positive definite"),
        ('iyy="0.0272"', 'iyy="0.5"', "triangle inequality"),
        ('<axis xyz="0 -1 0"/>', '<axis xyz="0 0 0"/>', "axis> is zero"),
        ('<axis xyz="0 -1 0"/>', '<axis xyz="0 -1"/>', "needs 3 finite"),
        ('<child link="fore"/>', '<child link="upper"/>', "already has a parent"),
        ('<parent link="base_link"/>', '<parent link="hand"/>', "closed loop"),
        ("</joint>", '<mimic joint="shoulder"/></joint>', "mimic"),
    ],
    ids=[
        "mass-text", "mass-negative", "mass-nan", "inertia-negative", "triangle",
        "axis-zero", "axis-two-numbers", "second-parent", "loop", "mimic",
    ],
)
def test_meaningless_urdf_content_is_one_line(tmp_path, capsys, old, new, why):
    """Each gives one line naming the URDF and what is wrong, exit 2, before pinocchio runs
    (a closed loop used to crash it; a negative mass used to be scored)."""
    prob, urdf = _edit(tmp_path, old, new)
    with pytest.raises(ProblemError, match=why):
        load_problem(prob, check_reach=False)
    assert main(["check", str(prob)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(urdf) in err and "Traceback" not in err


@pytest.mark.parametrize("kind", ["dev-zero", "fifo", "folder"])
def test_special_files_are_refused_without_reading(tmp_path, capsys, kind):
    """A problem, plan or actuator file that is /dev/zero, a FIFO nobody writes or a folder
    gives one line, exit 2, at once (it used to read gigabytes or hang)."""
    target = tmp_path / "special"
    if kind == "dev-zero":
        target = "/dev/zero"
    elif kind == "fifo":
        os.mkfifo(target)
    else:
        target.mkdir()
    for args in (["check", str(target)],
                 ["score", str(PLANAR), "--plan", str(target)],
                 ["swap", str(PLANAR), "--actuators", str(target), "--from", str(tmp_path)]):
        assert main(args) == 2, args
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err
        assert "not a regular file" in err or "folder" in err


@pytest.mark.parametrize("how", ["nested", "many-links"])
def test_deep_or_huge_trees_are_refused_in_one_line(tmp_path, capsys, how):
    """Elements nested 5,000 deep (the XML writer recursed and crashed) or 3,000 links:
    one line, exit 2."""
    from optimizer.arm import MAX_LINKS

    base = (PLANAR.parent / "arm.urdf").read_text()
    if how == "nested":
        text = base.replace('<link name="tip"/>', '<link name="tip">' + "<x>" * 5000 + "</x>" * 5000 + "</link>")
        message = "nest 5002 deep"
    else:
        links = "".join(f'<link name="extra{i}"/>' for i in range(3000))
        text = base.replace("</robot>", links + "</robot>")
        message = f"at most {MAX_LINKS}"
    prob, urdf = _copy(tmp_path, text)
    with pytest.raises(ProblemError, match=message):
        load_problem(prob, check_reach=False)
    assert main(["check", str(prob)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and str(urdf) in err and "Traceback" not in err
