"""Campaign manifests: a TOML file listing candidates and their runs.

Format (documented for users in docs/campaigns.md)::

    title = "Fictional screening round"

    [settings]                        # campaign-wide; a candidate may override any of these
    mobile = "Li"                     # mobile species (one symbol or a list)
    target_temperature = "300K"
    haven_ratio = 1.0
    tier_bounds_S_per_cm = [1e-4, 1e-3]
    reference = "framework"           # drift reference: framework, all or none
    start = "2ps"                     # equilibration dropped from every run

    [[candidates]]
    name = "Vexolite-A"
    charge = 1                        # of the mobile ion, e (alkali/alkaline earth by default)

    [[candidates.runs]]
    files = ["vexolite_a/T600/XDATCAR.gz"]   # relative to the manifest
    temperature = "600K"
    frame_interval = "50fs"
    format = "xdatcar"                # optional; also md_timestep, lammps_units, type_map, start

Paths are relative to the manifest's folder. Run cards beside the files are read too.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field

from ..errors import InputError, UnitsError
from ..trajectory import REFERENCES
from ..units import parse_temperature_K, parse_time_ps
from . import FORMATS
from .lammpsdump import UNIT_STYLES

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib

__all__ = ["Manifest", "CandidateSpec", "RunSpec", "read_manifest", "SETTING_KEYS"]

SETTING_KEYS = ("mobile", "target_temperature", "haven_ratio", "tier_bounds_S_per_cm",
                "reference", "start", "charge", "window", "method")
RUN_KEYS = ("files", "temperature", "frame_interval", "md_timestep", "format", "lammps_units",
            "type_map", "start", "override", "label")
CANDIDATE_KEYS = ("name", "runs", "notes") + SETTING_KEYS


@dataclass(frozen=True)
class RunSpec:
    """One MD run of a candidate: its files (absolute paths) and read options."""

    files: tuple
    temperature_K: float | None
    frame_interval_ps: float | None = None
    md_timestep_ps: float | None = None
    format: str | None = None
    lammps_units: str | None = None
    type_map: dict | None = None
    start_ps: float = 0.0
    override: bool = False
    label: str = ""

    def read_options(self):
        """The :class:`~diffkit.io.assemble.ReadOptions` for this run."""
        from .assemble import ReadOptions

        return ReadOptions(format=self.format, frame_interval_ps=self.frame_interval_ps,
                           md_timestep_ps=self.md_timestep_ps, temperature_K=self.temperature_K,
                           type_map=self.type_map, units=self.lammps_units, start_ps=self.start_ps,
                           override=self.override)


@dataclass(frozen=True)
class CandidateSpec:
    """A candidate material: a name, its settings and its runs."""

    name: str
    runs: tuple
    settings: dict = field(default_factory=dict)
    notes: str = ""

    @property
    def mobile(self):
        """Mobile species as a tuple of symbols."""
        m = self.settings.get("mobile", "Li")
        return (m,) if isinstance(m, str) else tuple(m)


@dataclass(frozen=True)
class Manifest:
    """A whole campaign."""

    path: str
    title: str
    settings: dict
    candidates: tuple


def _where(path, what):
    return f"{path}: {what}"


def _unknown(path, where, data, allowed):
    bad = sorted(set(data) - set(allowed))
    if bad:
        raise InputError(_where(path, f"{where}: unknown key(s) {', '.join(bad)}; "
                                      f"known keys: {', '.join(allowed)}"))


def _choice(key, value, allowed):
    """A lower-case string from ``allowed`` (any non-empty string when None)."""
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"{key} must be a word, got {value!r}")
    v = value.strip().lower()
    if allowed is not None and v not in allowed:
        raise InputError(f"{key} = {value!r} is not one of {', '.join(allowed)}")
    return v


def _settings(path, where, data):
    out = {}
    k = ""
    try:
        for k in SETTING_KEYS:
            if k not in data:
                continue
            v = data[k]
            if k == "mobile":
                if isinstance(v, list) and v and all(isinstance(x, str) for x in v):
                    v = [x.strip() for x in v]
                elif not isinstance(v, str) or not v.strip():
                    raise InputError(f"mobile must be an element symbol or a list of them, "
                                     f"got {v!r}")
                else:
                    v = v.strip()
            elif k == "target_temperature":
                v = parse_temperature_K(v, "target_temperature")
            elif k == "start":
                v = parse_time_ps(v, "start")
            elif k == "window":
                if not (isinstance(v, list) and len(v) == 2):
                    raise InputError("window must be a pair like [\"2ps\", \"20ps\"]")
                v = (parse_time_ps(v[0], "window"), parse_time_ps(v[1], "window"))
            elif k == "tier_bounds_S_per_cm":
                v = tuple(float(x) for x in v)
            elif k in ("haven_ratio", "charge"):
                v = float(v)
            elif k == "reference":
                v = _choice("reference", v, REFERENCES)
            elif k == "method":
                v = _choice("method", v, None)
            out[k] = v
    except (UnitsError, InputError) as exc:
        raise InputError(_where(path, f"{where}: {exc}")) from exc
    except (TypeError, ValueError) as exc:
        raise InputError(_where(path, f"{where}: {k} = {data[k]!r} is not valid ({exc})")) from exc
    return out


def read_manifest(path):
    """Read and check a campaign manifest.

    Returns
    -------
    Manifest
        With absolute file paths; each candidate's ``settings`` already merged
        with the campaign-wide ones.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            data = tomllib.load(f)
    except FileNotFoundError as exc:
        raise InputError(f"{path}: no such manifest") from exc
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from exc
    _unknown(path, "top level", data, ("title", "settings", "candidates"))
    base = os.path.dirname(os.path.abspath(path))
    settings = _settings(path, "[settings]", data.get("settings", {}))
    _unknown(path, "[settings]", data.get("settings", {}), SETTING_KEYS)
    cands = data.get("candidates", [])
    if not isinstance(cands, list) or not cands:
        raise InputError(_where(path, "no [[candidates]] listed"))
    out, names = [], set()
    for ci, c in enumerate(cands):
        where = f"candidate {ci + 1}"
        if not isinstance(c, dict):
            raise InputError(_where(path, f"{where} is not a [[candidates]] table"))
        name = str(c.get("name", "")).strip()
        _unknown(path, f"candidate {name!r}" if name else where, c, CANDIDATE_KEYS)
        if not name:
            raise InputError(_where(path, f"{where} has no name"))
        if name in names:
            raise InputError(_where(path, f"candidate name {name!r} appears twice"))
        names.add(name)
        where = f"candidate {name!r}"
        merged = dict(settings)
        merged.update(_settings(path, where, c))
        runs = []
        run_tables = c.get("runs", [])
        if not isinstance(run_tables, list) or not all(isinstance(r, dict) for r in run_tables):
            raise InputError(_where(path, f"{where}: runs must be [[candidates.runs]] tables"))
        for ri, r in enumerate(run_tables):
            rwhere = f"{where}, run {ri + 1}"
            _unknown(path, rwhere, r, RUN_KEYS)
            files = r.get("files")
            if isinstance(files, str):
                files = [files]
            if not files:
                raise InputError(_where(path, f"{rwhere} lists no files"))
            if not isinstance(files, list) or not all(isinstance(f, str) and f for f in files):
                raise InputError(_where(path, f"{rwhere}: files must be a list of paths "
                                              f"(strings), got {files!r}"))
            try:
                T = parse_temperature_K(r["temperature"], "temperature") if "temperature" in r else None
                dt = parse_time_ps(r["frame_interval"], "frame_interval") if "frame_interval" in r else None
                ts = parse_time_ps(r["md_timestep"], "md_timestep") if "md_timestep" in r else None
                start = parse_time_ps(r["start"], "start") if "start" in r else merged.get("start", 0.0)
            except UnitsError as exc:
                raise InputError(_where(path, f"{rwhere}: {exc}")) from exc
            try:
                fmt = _choice("format", r["format"], tuple(FORMATS)) if "format" in r else None
                units = (_choice("lammps_units", r["lammps_units"], tuple(UNIT_STYLES))
                         if "lammps_units" in r else None)
            except InputError as exc:
                raise InputError(_where(path, f"{rwhere}: {exc}")) from exc
            tmap = r.get("type_map")
            if tmap is not None:
                try:
                    tmap = {int(k): str(v) for k, v in tmap.items()}
                except (ValueError, AttributeError) as exc:
                    raise InputError(_where(path, f"{rwhere}: type_map must map integer types "
                                                  "to element symbols")) from exc
            runs.append(RunSpec(files=tuple(os.path.normpath(os.path.join(base, f)) for f in files),
                                temperature_K=T, frame_interval_ps=dt, md_timestep_ps=ts,
                                format=fmt, lammps_units=units,
                                type_map=tmap, start_ps=start, override=bool(r.get("override", False)),
                                label=str(r.get("label", ""))))
        if not runs:
            raise InputError(_where(path, f"{where} lists no [[candidates.runs]]"))
        out.append(CandidateSpec(name=name, runs=tuple(runs), settings=merged,
                                 notes=str(c.get("notes", ""))))
    return Manifest(path=os.path.abspath(path), title=str(data.get("title", "")),
                    settings=settings, candidates=tuple(out))
