"""Named factories for test models and problem files, built in code so tests run offline."""

from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "problems" / "polish7" / "problem.toml"
DEMO_PLANS = ROOT / "problems" / "polish7" / "plans"
PLANAR = ROOT / "problems" / "planar3" / "problem.toml"
PLANAR_PLANS = ROOT / "problems" / "planar3" / "plans"


def two_link_urdf(rods: bool = False) -> str:
    """Planar 2R arm in the vertical x-z plane, q measured from the horizontal, q2 relative.

    Links of length 1 m and mass 1 kg: point masses at the link ends (``rods=False``,
    lc = l, I = 0) or uniform rods (lc = 0.5, I = 1/12 about the centre).
    """
    lc, I = (0.5, 1.0 / 12.0) if rods else (1.0, 1e-12)

    def link(name: str) -> str:
        return (
            f'<link name="{name}"><inertial><origin xyz="{lc} 0 0"/><mass value="1"/>'
            f'<inertia ixx="1e-12" iyy="{I}" izz="{I}" ixy="0" ixz="0" iyz="0"/></inertial></link>'
        )

    return f"""<robot name="two_link">
<link name="base"/>{link("l1")}{link("l2")}<link name="tip"/>
<joint name="q1" type="revolute"><parent link="base"/><child link="l1"/><axis xyz="0 -1 0"/>
 <limit effort="100" velocity="10" lower="-6" upper="6"/></joint>
<joint name="q2" type="revolute"><parent link="l1"/><child link="l2"/><origin xyz="1 0 0"/>
 <axis xyz="0 -1 0"/><limit effort="100" velocity="10" lower="-6" upper="6"/></joint>
<joint name="tipj" type="fixed"><parent link="l2"/><child link="tip"/><origin xyz="1 0 0"/></joint>
</robot>"""


def pendulum_urdf(length: float = 1.0) -> str:
    """One point mass of 1 kg on a massless rod of ``length`` [m], swinging in x-z."""
    return f"""<robot name="pendulum"><link name="base"/>
<link name="bob"><inertial><origin xyz="{length} 0 0"/><mass value="1"/>
 <inertia ixx="1e-12" iyy="1e-12" izz="1e-12" ixy="0" ixz="0" iyz="0"/></inertial></link>
<joint name="swing" type="revolute"><parent link="base"/><child link="bob"/><axis xyz="0 -1 0"/>
 <limit effort="100" velocity="100" lower="-7" upper="7"/></joint></robot>"""


def slider_urdf(mass: float = 1.0) -> str:
    """A horizontal prismatic joint moving ``mass`` [kg] along x (gravity plays no part)."""
    return f"""<robot name="slider"><link name="base"/>
<link name="cart"><inertial><mass value="{mass}"/>
 <inertia ixx="1e-3" iyy="1e-3" izz="1e-3" ixy="0" ixz="0" iyz="0"/></inertial></link>
<joint name="rail" type="prismatic"><parent link="base"/><child link="cart"/><axis xyz="1 0 0"/>
 <limit effort="1e6" velocity="100" lower="-10" upper="10"/></joint>
<link name="tip"/><joint name="tipj" type="fixed"><parent link="cart"/><child link="tip"/></joint>
</robot>"""


def write_slider_problem(
    folder: Path, corner_hz: float, rate_hz: float, delay_ms: float = 0.0, extra: str = ""
) -> Path:
    """Unit mass on a rail, task x only, one first-order actuator (and ``delay_ms`` of
    transport delay), nothing else; ``extra`` is appended to the file."""
    (folder / "slider.urdf").write_text(slider_urdf())
    text = f"""
name = "slider"
[arm]
urdf = "slider.urdf"
tip_frame = "tip"
home = [0.0]
[control]
rate_hz = {rate_hz}
task_axes = ["x"]
tier_damping = 0.0
[simulation]
margin_samples = 1
settle_s = 0.0
[actuators.rail]
model = "first_order"
corner_hz = {corner_hz}
delay_ms = {delay_ms}
[[trajectory]]
name = "hold"
kind = "hold"
duration_s = 0.01
{extra}
"""
    path = folder / "problem.toml"
    path.write_text(text)
    return path


def planar_variant(folder: Path, *edits: tuple[str, str]) -> Path:
    """A copy of the planar3 problem in ``folder`` with text replacements (old, new) applied."""
    src = PLANAR.parent
    (folder / "arm.urdf").write_text((src / "arm.urdf").read_text())
    text = PLANAR.read_text()
    for old, new in edits:
        if old not in text:
            raise KeyError(f"{old!r} is not in the planar problem file")
        text = text.replace(old, new, 1)
    path = folder / "problem.toml"
    path.write_text(text)
    return path


#: The planar test arm (problems/planar3/arm.urdf) written as MJCF, with MJCF's own
#: conventions (problems/planar3/arm.xml): a site as the tool frame, efforts from
#: actuatorfrcrange and from motors (gear x ctrlrange), geoms that carry no mass, angles in
#: degrees (MJCF's default).
PLANAR_MJCF = (ROOT / "problems" / "planar3" / "arm.xml").read_text()
