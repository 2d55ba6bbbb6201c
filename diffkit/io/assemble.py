"""From trajectory files to unwrapped frames: run cards, times, restarts, unwrapping.

One or more files given in order (restarts) make one continuous run. This
module streams: it yields unwrapped chunks of frames, so that a trajectory
larger than memory can be written to a run file chunk by chunk
(:mod:`diffkit.io.store`), or collected into a :class:`~diffkit.Trajectory`
(:func:`read_trajectory`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import warnings
from datetime import datetime, timezone

import numpy as np

from ..errors import DiffkitWarning, InputError
from ..unwrap import DEFAULT_MAX_STEP_FRACTION, Unwrapper, minimum_image
from . import detect_format, reader_module, source_name
from .runcard import find_runcard, read_runcard

__all__ = ["ReadOptions", "RunAssembler", "read_trajectory", "file_fingerprint"]

_REL_TOL = 1e-6  # relative tolerance for "the same" frame interval or time
_TEMPERATURE_TOL_K = 0.5


@dataclasses.dataclass
class ReadOptions:
    """Everything the user may tell about a run that its files may lack.

    Times in ps, temperatures in K. ``None`` means "take it from the file or run card".
    """

    format: str | None = None
    frame_interval_ps: float | None = None
    md_timestep_ps: float | None = None
    temperature_K: float | None = None
    type_map: dict | None = None
    units: str | None = None
    start_ps: float = 0.0
    override: bool = False
    resample: bool = False
    max_step_fraction: float = DEFAULT_MAX_STEP_FRACTION
    frames_per_chunk: int = 2048
    use_runcards: bool = True

    def check(self):
        """Refuse values that make no sense (names the option)."""
        for name in ("frame_interval_ps", "md_timestep_ps", "temperature_K"):
            v = getattr(self, name)
            if v is not None and not (np.isfinite(v) and v > 0):
                raise InputError(f"{name} must be a positive number, got {v}")
        if not (np.isfinite(self.start_ps) and self.start_ps >= 0):
            raise InputError(f"start_ps must be zero or positive, got {self.start_ps}")
        if self.frames_per_chunk < 1:
            raise InputError(f"frames_per_chunk must be at least 1, got {self.frames_per_chunk}")


def file_fingerprint(path, block=1 << 20):
    """Size in bytes and SHA-256 of a file (streamed)."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as f:
        while True:
            data = f.read(block)
            if not data:
                break
            h.update(data)
            size += len(data)
    return {"path": os.path.abspath(path), "size_bytes": size, "sha256": h.hexdigest()}


class RunAssembler:
    """Stream unwrapped frames out of one or more files of a run.

    Parameters
    ----------
    paths : path or sequence of paths (or open files)
        Consecutive parts of one run (restarts), in order.
    options : ReadOptions

    After :meth:`chunks` has been exhausted, ``species``, ``temperature_K``,
    ``frame_interval_ps``, ``has_velocities`` and :meth:`provenance` describe the run.
    """

    def __init__(self, paths, options=None):
        if isinstance(paths, (str, os.PathLike)) or hasattr(paths, "read"):
            paths = [paths]
        self.paths = list(paths)
        if not self.paths:
            raise InputError("no trajectory file given")
        self.options = options or ReadOptions()
        self.options.check()
        self.species = None
        self.temperature_K = None
        self.frame_interval_ps = None
        self.has_velocities = None
        self.n_frames = 0
        self.formats = []
        self.notes = []
        self._runcards = []
        self._step0 = None   # first step number of the run (steps + frame interval given)
        self._dstep = None   # steps between saved frames

    # -- settings ----------------------------------------------------------------
    def _settings_for(self, path):
        """Options for one file: explicit options win over its run card."""
        opt = dataclasses.asdict(self.options)
        card_path = find_runcard(path) if self.options.use_runcards else None
        if card_path:
            card = read_runcard(card_path)
            self._runcards.append(os.path.abspath(card_path))
            for key in ("format", "frame_interval_ps", "md_timestep_ps", "temperature_K",
                        "type_map", "units"):
                if opt.get(key) is None and key in card:
                    opt[key] = card[key]
            if not opt["start_ps"] and "start_ps" in card and path is self.paths[0]:
                opt["start_ps"] = card["start_ps"]
        return opt

    def _check_temperature(self, name, from_file, given):
        if from_file is None:
            return given
        if given is None or self.options.override:
            return given if given is not None else from_file
        if abs(from_file - given) > _TEMPERATURE_TOL_K:
            raise InputError(f"{name}: the file says the temperature is {from_file:g} K but "
                             f"{given:g} K was given; pass override=True (--override) to use "
                             "the given value")
        return given

    # -- streaming ---------------------------------------------------------------
    def chunks(self):
        """Yield ``(times_ps, cells, positions, velocities)`` of unwrapped frames.

        Shapes (k,), (k, 3, 3), (k, n, 3) Å, (k, n, 3) Å/ps or None.
        """
        unwrapper = Unwrapper(self.options.max_step_fraction)
        run = {"last_time": None, "last_wrapped": None, "last_unwrapped": None,
               "t_first": None, "max_step": 0.0, "start_ps": None}
        for file_no, path in enumerate(self.paths):
            yield from self._file_chunks(file_no, path, unwrapper, run)
        if self.n_frames == 0:
            raise InputError(f"{source_name(self.paths[0])}: no frames left after dropping the "
                             f"first {run['start_ps']:g} ps (start_ps)")

    def _file_chunks(self, file_no, path, unwrapper, run):
        name = source_name(path)
        opt = self._settings_for(path)
        if run["start_ps"] is None:
            run["start_ps"] = opt["start_ps"]
        fmt = opt["format"] or detect_format(path)
        self.formats.append(fmt)
        reader = reader_module(fmt)
        unwrapper.new_segment()
        clock = {"interval": None, "prev_step": None, "prev_t": None, "t0": None}
        if run["last_time"] is not None:
            clock["t0"] = run["last_time"] + self.frame_interval_ps
        n_read = n_kept = 0
        for chunk in reader.iter_chunks(path, frames_per_chunk=opt["frames_per_chunk"],
                                        type_map=opt["type_map"], units=opt["units"]):
            k = len(chunk)
            if k == 0:
                continue
            self._check_atoms(chunk, name)
            self.temperature_K = self._check_temperature(
                name, chunk.meta.get("temperature_K"),
                opt["temperature_K"] if self.temperature_K is None else self.temperature_K)
            if n_read == 0 and run["last_time"] is not None and chunk.times_ps is None \
                    and chunk.steps is None:
                # no clock in the file: its first frame may repeat the previous file's last
                same = np.max(np.abs(minimum_image(chunk.positions[0] - run["last_wrapped"],
                                                   chunk.cells[0]))) < 1e-6
                if same:
                    clock["t0"] = run["last_time"]
            times = self._chunk_times(chunk, opt, name, clock)
            n_read += k
            keep = np.ones(k, dtype=bool)
            if run["last_time"] is not None:
                keep = times > run["last_time"] + _REL_TOL * max(abs(run["last_time"]), 1.0)
            if clock.get("thin_to"):
                grid = (times - run["t_first"]) / clock["thin_to"]
                keep &= np.abs(grid - np.round(grid)) < 1e-6
            sel = np.flatnonzero(keep)
            if sel.size < k and n_kept == 0 and not clock.get("thin_to"):
                n_dup = k - sel.size
                self.notes.append(f"{name}: dropped {n_dup} frame(s) that repeat the time of "
                                  "frames of the previous file")
                if n_dup > 1:
                    warnings.warn(f"{name}: the first {n_dup} frames overlap the previous file "
                                  "and were dropped", DiffkitWarning, stacklevel=3)
            if sel.size == 0:
                continue
            if run["t_first"] is None:
                run["t_first"] = float(times[sel[0]])
            first = chunk.first_frame + int(sel[0]) + 1  # frames count from 1 in messages
            if n_kept == 0 and run["last_wrapped"] is not None:
                self._check_join(name, first, minimum_image(
                    chunk.positions[sel[0]] - run["last_wrapped"], chunk.cells[sel[0]]), run)
            unwrapped = unwrapper.feed(chunk.positions[sel], chunk.cells[sel], chunk.kind,
                                       images=None if chunk.images is None else chunk.images[sel],
                                       source=name, first_frame=first)
            n_kept += sel.size
            if len(unwrapped) > 1:
                run["max_step"] = max(run["max_step"], float(
                    np.linalg.norm(np.diff(unwrapped, axis=0), axis=-1).max()))
            run["last_wrapped"] = chunk.positions[sel[-1]]
            run["last_unwrapped"] = unwrapped[-1]
            run["last_time"] = float(times[sel[-1]])
            tsel = times[sel]
            t_keep = (tsel - run["t_first"]) >= run["start_ps"] - 1e-9
            if not t_keep.any():
                continue
            vel = None
            if self.has_velocities and chunk.velocities is not None:
                vel = chunk.velocities[sel][t_keep]
            self.n_frames += int(t_keep.sum())
            yield tsel[t_keep], chunk.cells[sel][t_keep], unwrapped[t_keep], vel
        if n_read == 0:
            raise InputError(f"{name}: no complete frame found")
        if n_kept == 0:
            raise InputError(f"{name}: every frame's time lies before the end of the previous "
                             f"file ({run['last_time']:g} ps); parts of a restarted run must be "
                             "given in order and continue the clock")

    def _check_atoms(self, chunk, name):
        if self.species is None:
            self.species = tuple(chunk.species)
            self.has_velocities = chunk.velocities is not None
        elif tuple(chunk.species) != self.species:
            raise InputError(f"{name}: frame {chunk.first_frame + 1} has atoms "
                             f"{_describe(chunk.species)}, expected {_describe(self.species)} "
                             f"as in {source_name(self.paths[0])}")
        if chunk.velocities is None:
            self.has_velocities = False  # velocities only where every part has them

    def _check_join(self, name, frame, step, run):
        """Positions must continue across the join of two files (``step``: (n, 3) Å)."""
        join = np.linalg.norm(step, axis=-1)
        limit = 4 * run["max_step"] + 0.5
        if join.max() > limit:
            atom = int(np.argmax(join))
            raise InputError(
                f"{name}: frame {frame}, atom {atom} is {join[atom]:.3g} Å from where it was at "
                f"the end of the previous file (largest step between frames so far "
                f"{run['max_step']:.3g} Å): the files do not look like consecutive parts of one run")

    def _chunk_times(self, chunk, opt, name, clock):
        """Times of a chunk's frames, ps; checks even spacing and agreement with the user."""
        k = len(chunk)
        given_dt = opt["frame_interval_ps"]
        t0 = clock["t0"] or 0.0
        if chunk.times_ps is not None:
            times = np.asarray(chunk.times_ps, dtype=float)
            how = "the times in the file"
        elif chunk.steps is not None and opt["md_timestep_ps"] is not None:
            times = np.asarray(chunk.steps, dtype=float) * opt["md_timestep_ps"]
            how = "step numbers × md_timestep"
        elif chunk.steps is not None and given_dt is not None:
            steps = np.asarray(chunk.steps, dtype=np.int64)
            # step numbers continue across restarts: one origin for the whole run
            if self._step0 is None:
                self._step0 = int(steps[0])
            if self._dstep is None and (k > 1 or clock["prev_step"] is not None):
                seq = steps if k > 1 else np.array([clock["prev_step"], steps[0]])
                self._dstep = int(seq[1] - seq[0])
                if self._dstep <= 0:
                    raise InputError(f"{name}: frame {chunk.first_frame + 2}: step numbers do not "
                                     "increase")
            clock["prev_step"] = int(steps[-1])
            times = (steps - self._step0) / (self._dstep or 1) * given_dt
            how = "step numbers and the frame interval"
        elif given_dt is not None:
            start = t0 if clock["prev_t"] is None else clock["prev_t"] + given_dt
            times = start + np.arange(k) * given_dt
            how = "the frame interval"
        else:
            raise InputError(
                f"{name}: the time between saved frames is unknown; give it with "
                "--frame-interval (e.g. 20fs) or frame_interval_ps=, or md_timestep for files "
                "that record step numbers, or a run card (frame_interval = \"20fs\")")
        seq = times if clock["prev_t"] is None else np.concatenate([[clock["prev_t"]], times])
        if len(seq) >= 2:
            dt = np.diff(seq)
            ref = clock["interval"] if clock["interval"] is not None else float(dt[0])
            if not ref > 0:
                raise InputError(f"{name}: frame {chunk.first_frame + 2}: time does not increase "
                                 f"(from {how})")
            bad = np.flatnonzero(np.abs(dt - ref) > _REL_TOL * ref + 1e-9)
            if bad.size:
                i = int(bad[0]) + (1 if clock["prev_t"] is not None else 2)
                raise InputError(f"{name}: frame {chunk.first_frame + i}: frames are not evenly "
                                 f"spaced in time (step {dt[bad[0]]:.6g} ps, expected {ref:.6g} "
                                 f"ps, from {how})")
            if clock["interval"] is None:
                clock["interval"] = ref
                if given_dt is not None and abs(given_dt - ref) > _REL_TOL * ref:
                    if not self.options.override:
                        raise InputError(
                            f"{name}: the file's frames are {ref:.6g} ps apart ({how}) but a "
                            f"frame interval of {given_dt:.6g} ps was given; pass override=True "
                            "(--override) to use the given value")
                    clock["interval"] = given_dt
                    clock["rescaled"] = True
                    self.notes.append(f"{name}: frame interval {given_dt:g} ps given by the user "
                                      f"overrides the file's {ref:g} ps")
        if clock.get("rescaled"):
            start = (clock["prev_t"] + given_dt) if clock["prev_t"] is not None else t0
            times = start + np.arange(k) * given_dt
        interval = clock["interval"] if clock["interval"] is not None else given_dt
        if interval is not None:
            if self.frame_interval_ps is None:
                self.frame_interval_ps = interval
            elif abs(interval - self.frame_interval_ps) > _REL_TOL * self.frame_interval_ps:
                ratio = self.frame_interval_ps / interval
                if not self.options.resample:
                    raise InputError(
                        f"{name}: frames are {interval:.6g} ps apart but the previous file's were "
                        f"{self.frame_interval_ps:.6g} ps apart; a run keeps one frame interval "
                        "(pass resample=True / --resample to keep only the frames on the "
                        "coarser grid)")
                if ratio < 1 or abs(ratio - round(ratio)) > 1e-6:
                    raise InputError(
                        f"{name}: frames are {interval:.6g} ps apart, the run so far "
                        f"{self.frame_interval_ps:.6g} ps; resampling keeps frames on the "
                        "coarser grid of an earlier file, so the later file must be finer by a "
                        "whole factor (give the files so that the coarsest comes first)")
                clock["thin_to"] = self.frame_interval_ps
        clock["prev_t"] = float(times[-1])
        return times

    def provenance(self):
        """Where the frames came from and how they were read (JSON-ready dict)."""
        from .. import __version__

        sources = []
        for p, fmt in zip(self.paths, self.formats):
            entry = {"format": fmt}
            if isinstance(p, (str, os.PathLike)) and os.path.isfile(p):
                entry.update(file_fingerprint(p))
            else:
                entry["path"] = source_name(p)
            sources.append(entry)
        opts = {k: v for k, v in dataclasses.asdict(self.options).items() if v is not None}
        if opts.get("type_map"):
            opts["type_map"] = {str(k): v for k, v in opts["type_map"].items()}
        return {"sources": sources, "runcards": sorted(set(self._runcards)),
                "reader": ",".join(sorted(set(self.formats))), "diffkit_version": __version__,
                "created_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                "options": opts, "notes": list(self.notes)}


def _describe(species):
    out = {}
    for s in species:
        out[s] = out.get(s, 0) + 1
    return f"{len(species)} atoms (" + ", ".join(f"{k}:{v}" for k, v in out.items()) + ")"


def read_trajectory(paths, *, format=None, frame_interval_ps=None, md_timestep_ps=None,
                    temperature_K=None, type_map=None, units=None, start_ps=0.0,
                    override=False, resample=False, max_step_fraction=DEFAULT_MAX_STEP_FRACTION,
                    use_runcards=True):
    """Read one run (one file, or several consecutive files of a restarted run).

    Parameters
    ----------
    paths : str, path-like, open file, or a sequence of them
        The run's files in order; gzip, bz2 and xz are read transparently.
    format : str, optional
        A key of ``diffkit.io.FORMATS``; detected from the name or content otherwise.
    frame_interval_ps : float, optional, ps
        Time between saved frames, where the file does not hold it.
    md_timestep_ps : float, optional, ps
        Integration step; enough on its own for files with step numbers (LAMMPS).
    temperature_K : float, optional, K
        Nominal temperature, where the file does not hold it.
    type_map : dict of int to str, optional
        LAMMPS atom type to element symbol.
    units : str, optional
        LAMMPS unit style (``"metal"`` or ``"real"``).
    start_ps : float, ps
        Equilibration time to drop from the start.
    override : bool
        Let given values win where the file disagrees (said in the provenance).
    resample : bool
        Where a later file saved frames more often (by a whole factor), keep only
        the frames on the first file's grid instead of stopping with an error.
    max_step_fraction : float
        Largest displacement between frames, as a fraction of the smallest cell
        height, that is unwrapped; more is an error.
    use_runcards : bool
        Read ``<file>.runcard.toml`` / ``runcard.toml`` beside the files.

    Returns
    -------
    Trajectory
    """
    from ..trajectory import Trajectory

    opts = ReadOptions(format=format, frame_interval_ps=frame_interval_ps,
                       md_timestep_ps=md_timestep_ps, temperature_K=temperature_K,
                       type_map=type_map, units=units, start_ps=start_ps, override=override,
                       resample=resample, max_step_fraction=max_step_fraction, use_runcards=use_runcards)
    asm = RunAssembler(paths, opts)
    parts = list(asm.chunks())
    times = np.concatenate([p[0] for p in parts])
    cells = np.concatenate([p[1] for p in parts])
    pos = np.concatenate([p[2] for p in parts])
    vel = None
    if asm.has_velocities and all(p[3] is not None for p in parts):
        vel = np.concatenate([p[3] for p in parts])
    return Trajectory(asm.species, times, cells, pos, velocities=vel,
                      temperature_K=asm.temperature_K, frame_interval_ps=asm.frame_interval_ps,
                      provenance=asm.provenance())
