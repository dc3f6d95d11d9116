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
    with pytest.raises(ProblemError, match="the limit is 8 MiB"):
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
