"""Writing one joint's actuator table into a TOML file, keeping the rest of the file.

The file may be a problem file or an actuator file (``[actuators.<joint>]`` tables):
only that joint's model keys change; every other table, key, comment and the layout
stay as they were (tomlkit keeps them). The new text replaces the old by rename, so a
failure leaves the old file whole; a problem file is loaded once more before the
rename, so an edit never leaves a problem that does not load.
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Mapping
from pathlib import Path

import tomlkit
import tomlkit.exceptions
from tomlkit.items import InlineTable, Table

from .exceptions import InputError
from .problem import MODEL_KEYS

__all__ = [
    "update_actuator",
    "write_calibrated",
]


def update_actuator(
    path: Path,
    joint: str,
    model: str,
    values: Mapping[str, float],
    note: str,
    validate: Callable[[Path], object] | None = None,
) -> str:
    """Set ``[actuators.<joint>]`` model, parameters and ``delay_ms`` in ``path``.

    Keys of the old model that the new one does not use are removed; every other key of
    the joint (effort, friction, ...) stays. ``note`` becomes a comment on the ``model``
    line. ``validate`` is called with a temporary copy beside ``path`` before the
    rename (for a problem file: load it). Returns ``"created"`` or ``"updated"``.
    """
    path = Path(path)
    existed = path.is_file()
    if existed:
        try:
            doc = tomlkit.parse(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError) as err:
            raise InputError(path, "", f"could not be read: {err}") from err
        except tomlkit.exceptions.ParseError as err:
            raise InputError(path, "", f"TOML syntax error: {err}") from err
    else:
        doc = tomlkit.document()
        doc.add(tomlkit.comment("Actuator settings written by 'tierplan fit' (simulation only)."))
        doc.add(tomlkit.comment("Apply with 'tierplan swap --actuators <this file>'."))
    acts = doc.get("actuators")
    if acts is None:
        acts = tomlkit.table(is_super_table=True)
        doc.add("actuators", acts)
    elif not isinstance(acts, Table | InlineTable):
        raise InputError(path, "actuators", "must be a table to hold [actuators.<joint>]")
    sect = acts.get(joint)
    if sect is None:
        sect = tomlkit.table()
        acts.add(joint, sect)
    elif not isinstance(sect, Table | InlineTable):
        raise InputError(path, f"actuators.{joint}", "must be a table")
    for k in sorted(MODEL_KEYS - {"model"}):
        if k in sect and k not in values:
            del sect[k]
    item = tomlkit.item(model)
    if isinstance(sect, Table):
        item.comment(note)
    sect["model"] = item
    for k, v in values.items():
        sect[k] = v
    _replace(path, tomlkit.dumps(doc), validate)
    return "updated" if existed else "created"


def _replace(path: Path, text: str, validate: Callable[[Path], object] | None) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(text)
            f.flush()
            os.fsync(f.fileno())
        if validate is not None:
            try:
                validate(Path(tmp))
            except InputError as err:
                raise InputError(
                    path, err.key, f"the edit would not load ({err.reason}); file left as it was"
                ) from err
        if path.exists():
            os.chmod(tmp, path.stat().st_mode & 0o7777)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_calibrated(
    problem_path: Path,
    target: Path,
    plant: Mapping[str, object],
    joints: Mapping[str, Mapping[str, object]],
    note: str,
    validate: Callable[[Path], object] | None = None,
) -> None:
    """Write a copy of the problem file at ``target`` with ``[plant]`` keys and each
    joint's ``[actuators.<joint>]`` keys set (a joint's table gets the full model: ``model``
    and its parameters); every other key, table and comment stays. The URDF path is made
    relative to the target's folder (an MJCF path too). Replaced whole or not at all."""
    problem_path, target = Path(problem_path), Path(target)
    from .inputs import read_text

    text = read_text(problem_path, "problem", InputError)
    try:
        doc = tomlkit.parse(text)
    except tomlkit.exceptions.ParseError as err:
        raise InputError(problem_path, "", f"TOML syntax error: {err}") from err
    arm = doc.get("arm")
    for model_key in ("urdf", "mjcf"):
        if isinstance(arm, Table | InlineTable) and isinstance(arm.get(model_key), str):
            model = (problem_path.parent / str(arm[model_key])).resolve()
            arm[model_key] = os.path.relpath(model, target.parent.resolve())
    tp = doc.get("plant")
    if tp is None:
        tp = tomlkit.table()
        doc.add("plant", tp)
    for k, v in plant.items():
        tp[k] = v
    if isinstance(tp, Table):
        tp.add(tomlkit.comment(note))
    acts = doc.get("actuators")
    if acts is None:
        acts = tomlkit.table(is_super_table=True)
        doc.add("actuators", acts)
    for joint, values in joints.items():
        sect = acts.get(joint)
        if sect is None:
            sect = tomlkit.table()
            acts.add(joint, sect)
        if "model" in values:
            for k in sorted(MODEL_KEYS - {"model"}):
                if k in sect and k not in values:
                    del sect[k]
        for k, v in values.items():
            sect[k] = v
    _replace(target, tomlkit.dumps(doc), validate)
