"""Share of a score the stability margins take, against the arm's joint count.

Arms of 7, 14 and 28 joints (an invented serial chain: alternating pitch and yaw axes,
0.5 kg links, 60 Hz first-order drives behind one period of delay, a 1 kHz loop) follow
two 1.2 s trajectories with a two-tier plan (every joint, then the distal half). Per arm,
CPU time (best of 3) of the nominal score without margins, with the three margins, and of
the robust score a search trial makes (with margins, plus 4 perturbed plants checked for
stability). Prints the seconds and the margins' share of the nominal score and of the
search trial's score, then how the margins split: linearising the loop at the sampled
instants (controller and plant Jacobians) against locating the three margins on the
linearised loop (eigenvalue solves), the linearisation also as a share of the score
without margins. Last line ``margin_share_7=<a> ... margin_share_28=<c>
trial_share_28=<t> score_s_28=<s> linearise_share_28=<l>`` (shares of the nominal score
with margins, of the trial's, and the linearisation's share of the score without
margins).

Usage: python bench/margin_cost.py [JOINTS ...]
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from timing import best_cpu  # bench/timing.py, beside this script

from optimizer.blas import one_thread

one_thread()

from optimizer.evaluate import evaluate, make_loop, plan_controller  # noqa: E402
from optimizer.plan import Plan, Tier  # noqa: E402
from optimizer.problem import load_problem  # noqa: E402
from optimizer.robust import evaluate_robust, plant_set  # noqa: E402
from optimizer.stability import LinearLoop  # noqa: E402


def chain_urdf(n: int) -> str:
    """A serial chain of ``n`` revolute joints, 0.1 m apart, 0.5 kg per link."""
    links = ['<link name="base"/>']
    joints = []
    parent = "base"
    for j in range(n):
        axis = "0 1 0" if j % 2 == 0 else "0 0 1"
        link = f"l{j}"
        links.append(
            f'<link name="{link}"><inertial><origin xyz="0.05 0 0"/><mass value="0.5"/>'
            '<inertia ixx="0.0005" iyy="0.001" izz="0.001" ixy="0" ixz="0" iyz="0"/>'
            "</inertial></link>"
        )
        joints.append(
            f'<joint name="j{j}" type="revolute"><parent link="{parent}"/>'
            f'<child link="{link}"/><origin xyz="{0.1 if j else 0.0} 0 0"/>'
            f'<axis xyz="{axis}"/><limit effort="80" velocity="5" lower="-3" upper="3"/>'
            "</joint>"
        )
        parent = link
    links.append('<link name="tip"/>')
    joints.append(
        f'<joint name="tip_joint" type="fixed"><parent link="{parent}"/><child link="tip"/>'
        '<origin xyz="0.1 0 0"/></joint>'
    )
    return '<robot name="chain">' + "".join(links + joints) + "</robot>"


def chain_problem(folder: Path, n: int) -> Path:
    (folder / "arm.urdf").write_text(chain_urdf(n))
    home = ", ".join("20.0" if j % 2 == 0 else "-10.0" for j in range(n))
    (folder / "problem.toml").write_text(
        f"""name = "chain{n}"
[arm]
urdf = "arm.urdf"
tip_frame = "tip"
home = [{home}]
[control]
rate_hz = 1000.0
task_axes = ["x", "y", "z"]
null_stiffness_nm_per_rad = 5.0
null_damping_nms_per_rad = 1.0
[simulation]
settle_s = 0.1
margin_samples = 3
[actuators.default]
model = "first_order"
corner_hz = 60.0
delay_ms = 1.0
armature_kgm2 = 0.01
viscous_nms_per_rad = 0.2
[perturb]
plants = 4
[[trajectory]]
name = "reach"
kind = "line"
duration_s = 1.2
delta_m = [0.0, 0.03, 0.02]
move_s = 0.8
[[trajectory]]
name = "wave"
kind = "sine"
duration_s = 1.2
axis = [0.0, 0.0, 1.0]
amplitude_m = 0.01
frequency_hz = 1.0
ramp_s = 0.3
"""
    )
    return folder / "problem.toml"


def main() -> None:
    counts = [int(x) for x in sys.argv[1:]] or [7, 14, 28]
    shares: dict[int, float] = {}
    trials: dict[int, float] = {}
    lins: dict[int, float] = {}
    last = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        for n in counts:
            folder = Path(tmp) / f"chain{n}"
            folder.mkdir()
            prob = load_problem(chain_problem(folder, n), check_reach=False)
            distal = tuple(range(n // 2, n))
            plan = Plan((Tier(tuple(range(n)), 100.0, 0.0, 0.8),
                         Tier(distal, 300.0, 0.0, 0.8)), label="two tiers")

            def run(margin: bool, prob=prob, plan=plan):  # type: ignore[no-untyped-def]
                return evaluate(prob, plan_controller(prob, plan), "p",
                                compute_margin=margin)

            plants = plant_set(prob, prob.perturb.plants)

            def trial(prob=prob, plan=plan, plants=plants):  # type: ignore[no-untyped-def]
                return evaluate_robust(prob, plants, lambda p: plan_controller(p, plan), "p")

            s = run(True)  # compile, and check the plan is stable
            a = best_cpu(lambda: run(False))
            b = best_cpu(lambda: run(True))
            c = best_cpu(trial)
            loop = make_loop(prob, plan_controller(prob, plan))
            instants = []
            for ref in prob.references:
                instants += [(ref, k, st) for k, st in loop.rollout(ref).snapshots]

            def linearise(loop=loop, instants=instants):  # type: ignore[no-untyped-def]
                for ref, k, st in instants:
                    loop.controller.bind(ref)
                    LinearLoop(loop, k, st)

            lin = best_cpu(linearise)
            shares[n] = (b - a) / b
            trials[n] = (b - a) / c
            lins[n] = lin / a
            last = b
            print(f"{n:3d} joints: score {a:6.3f} s CPU, with margins {b:6.3f} s, search trial "
                  f"{c:6.3f} s: margins {shares[n]:.0%} of the score, {trials[n]:.0%} of the "
                  f"trial (stiffness margin {s.stiffness_margin:.3g}, feasible {s.feasible})")
            print(f"           margins {b - a:6.3f} s: linearising at {len(instants)} instants "
                  f"{lin:6.3f} s ({lins[n]:.0%} of the score without margins), locating the "
                  f"margins on it {b - a - lin:6.3f} s")
    print(" ".join(f"margin_share_{n}={v:.2f}" for n, v in shares.items())
          + f" trial_share_{counts[-1]}={trials[counts[-1]]:.2f} score_s_{counts[-1]}={last:.3f}"
          + f" linearise_share_{counts[-1]}={lins[counts[-1]]:.2f}")


if __name__ == "__main__":
    main()
