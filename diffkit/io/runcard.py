"""Run cards: a small TOML file beside a trajectory holding what the file lacks.

A run card applies to one trajectory file when named ``<file name>.runcard.toml``
(e.g. ``XDATCAR.gz.runcard.toml``), or to every trajectory in its folder when
named ``runcard.toml``; the per-file card wins. Keys (all optional)::

    frame_interval = "20fs"   # time between saved frames
    md_timestep = "2fs"       # integration step (for files that record step numbers)
    temperature = "900K"      # nominal (thermostat) temperature
    format = "xdatcar"        # a key of diffkit.io.FORMATS
    lammps_units = "metal"    # LAMMPS unit style of a dump
    start = "5ps"             # equilibration to drop from the start
    mobile = ["Li"]           # mobile species
    [charges]                 # ionic charge of mobile species, e
    Li = 1
    [type_map]                # LAMMPS atom type -> element symbol
    1 = "Li"
    2 = "S"

Values given on the command line or in the API take precedence over the card.
"""

from __future__ import annotations

import os

from ..errors import InputError, UnitsError
from ..units import parse_temperature_K, parse_time_ps

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = ["RUNCARD_KEYS", "find_runcard", "read_runcard", "write_runcard"]

RUNCARD_KEYS = ("frame_interval", "md_timestep", "temperature", "format", "lammps_units",
                "start", "mobile", "charges", "type_map")
FOLDER_CARD = "runcard.toml"
SUFFIX = ".runcard.toml"


def find_runcard(path):
    """The run card that applies to trajectory ``path``, or None."""
    if not isinstance(path, (str, os.PathLike)):
        return None
    path = os.fspath(path)
    own = path + SUFFIX
    if os.path.isfile(own):
        return own
    folder = os.path.join(os.path.dirname(path) or ".", FOLDER_CARD)
    return folder if os.path.isfile(folder) else None


def read_runcard(path):
    """Read a run card into internal units.

    Returns
    -------
    dict
        Keys ``frame_interval_ps``, ``md_timestep_ps``, ``temperature_K``,
        ``format``, ``units``, ``start_ps``, ``mobile`` (list), ``charges``
        (dict), ``type_map`` (dict int -> str), for those present.
    """
    try:
        with open(path, "rb") as f:
            data = tomllib.load(f)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from exc
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc
    unknown = sorted(set(data) - set(RUNCARD_KEYS))
    if unknown:
        raise InputError(f"{path}: unknown run-card key(s) {', '.join(unknown)}; "
                         f"known keys: {', '.join(RUNCARD_KEYS)}")
    out = {}
    try:
        if "frame_interval" in data:
            out["frame_interval_ps"] = parse_time_ps(data["frame_interval"], "frame_interval")
        if "md_timestep" in data:
            out["md_timestep_ps"] = parse_time_ps(data["md_timestep"], "md_timestep")
        if "temperature" in data:
            out["temperature_K"] = parse_temperature_K(data["temperature"], "temperature")
        if "start" in data:
            out["start_ps"] = parse_time_ps(data["start"], "start")
    except UnitsError as exc:
        raise UnitsError(f"{path}: {exc}") from exc
    if "format" in data:
        out["format"] = str(data["format"])
    if "lammps_units" in data:
        out["units"] = str(data["lammps_units"])
    if "mobile" in data:
        mob = data["mobile"]
        out["mobile"] = [mob] if isinstance(mob, str) else [str(m) for m in mob]
    if "charges" in data:
        try:
            out["charges"] = {str(k): float(v) for k, v in dict(data["charges"]).items()}
        except (TypeError, ValueError) as exc:
            raise InputError(f"{path}: [charges] must map element symbols to numbers") from exc
    if "type_map" in data:
        try:
            out["type_map"] = {int(k): str(v) for k, v in dict(data["type_map"]).items()}
        except (TypeError, ValueError) as exc:
            raise InputError(f"{path}: [type_map] must map integer atom types to element "
                             "symbols, e.g. 1 = \"Li\"") from exc
    return out


def _toml_value(v):
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to a run card")


def write_runcard(path, **keys):
    """Write a run card (atomically). Keys as in :data:`RUNCARD_KEYS`; values as in the file.

    Example: ``write_runcard("XDATCAR.runcard.toml", frame_interval="20fs", temperature="900K")``.
    """
    from .atomic import atomic_write

    unknown = sorted(set(keys) - set(RUNCARD_KEYS))
    if unknown:
        raise InputError(f"unknown run-card key(s) {', '.join(unknown)}")
    lines, tables = [], []
    for k, v in keys.items():
        if v is None:
            continue
        if isinstance(v, dict):
            tables.append(f"\n[{k}]")
            tables.extend(f"{kk if k != 'type_map' else int(kk)} = {_toml_value(vv)}"
                          for kk, vv in v.items())
        else:
            lines.append(f"{k} = {_toml_value(v)}")
    with atomic_write(path, "w") as f:
        f.write("\n".join(lines + tables) + "\n")
    return path
