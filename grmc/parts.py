"""Finished chunks kept next to the output file, so an interrupted run can resume.

While ``grmc run`` works, every chunk of trajectories whose accumulators come back is saved
at once in the folder ``<OUT>.parts/`` (``OUT`` the output file), one file per chunk, each
written atomically (:mod:`grmc.atomic`): an interruption never leaves a half-written part
(parts are not flushed to disk one by one, which would cost more than small chunks take; a
part that a power loss cut short is found unreadable and computed again).
The folder's ``manifest.json`` holds a signature of what decides a chunk's data: the
scenario text, the ``[run]`` settings as run (overrides applied), the seed, the plan's grid
(segments, fine bin, time slices, jackknife groups, channel list, start state) and the grmc
version.  ``--resume`` loads the parts whose signature matches, computes only the missing
chunks and merges all of them in chunk order, so the file equals an uninterrupted run's.
The folder is removed once the output file is written.

Parts are Python pickles of :class:`grmc.accumulators.Accumulators`: load only parts your
own runs wrote (a pickle from an untrusted source can run code).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import pickle
import shutil
from pathlib import Path

import numpy as np

from .atomic import atomic_target, write_text_atomic
from .plan import Plan

__all__ = ["PARTS_SUFFIX", "PartsRefused", "Parts", "parts_dir", "plan_signature"]

#: Suffix of the folder that keeps finished chunks beside the output file.
PARTS_SUFFIX = ".parts"
#: Keys of ``[run]`` that do not change any chunk's data (left out of the signature).
_NOT_IN_SIGNATURE = ("max_seconds",)


class PartsRefused(ValueError):
    """Parts that may not be used or overwritten (a different run, or no ``--resume``)."""


def parts_dir(out: str | os.PathLike[str]) -> Path:
    """The parts folder of output file ``out``: ``<OUT>.parts``."""
    out = Path(out)
    return out.with_name(out.name + PARTS_SUFFIX)


def _plain(value):
    """JSON-ready form of plan and scenario values (arrays as lists)."""
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (np.integer, np.floating)):
        return value.item()
    if isinstance(value, (tuple, list)):
        return [_plain(v) for v in value]
    return value


def plan_signature(plan: Plan) -> str:
    """A short hash of everything that decides the data of a chunk of ``plan``.

    Parameters
    ----------
    plan : Plan

    Returns
    -------
    str  16 hexadecimal digits
    """
    from . import __version__
    from .plan import CHUNK_TRAJECTORIES

    run = {k: _plain(v) for k, v in dataclasses.asdict(plan.run).items()
           if k not in _NOT_IN_SIGNATURE}
    what = {
        "grmc": __version__,
        "scenario": plan.scenario.text,
        "run": run,
        "seed": int(plan.seed),
        "segments": int(plan.segments),
        "dt_fine": float(plan.dt_fine),
        "slices": [plan.slices.settle_slices, plan.slices.window_slices],
        "jackknife": int(plan.jackknife),
        "chunk": CHUNK_TRAJECTORIES,
        "channels": list(plan.names),
        "start": _plain(plan.base.x0),
        "excess": _plain(plan.excess),
    }
    text = json.dumps(what, sort_keys=True, default=repr)
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _name(chunk: range) -> str:
    return f"chunk_{chunk.start:09d}_{chunk.stop:09d}.pkl"


class Parts:
    """The finished chunks of one run, kept in ``<OUT>.parts/``.

    The folder is made when the first chunk is saved, so a run stopped before any chunk
    finished leaves nothing behind.

    Parameters
    ----------
    out : path  The output file
    plan : Plan  The run's plan (its signature is checked against the folder's)
    resume : bool  Use parts an earlier run left; without it, existing parts are refused

    Raises
    ------
    PartsRefused
        Parts exist and ``resume`` is false, or they belong to a different run.
    """

    def __init__(self, out: str | os.PathLike[str], plan: Plan, *, resume: bool):
        self.out = Path(out)
        self.folder = parts_dir(out)
        self.signature = plan_signature(plan)
        self.found = 0  # parts present when the run started
        manifest = self.folder / "manifest.json"
        if self.folder.exists():
            if not resume:
                raise PartsRefused(f"{self.folder}: the finished chunks of an interrupted run "
                                   "are here; add --resume to continue it, or delete the "
                                   "folder to start afresh")
            try:
                old = json.loads(manifest.read_text()).get("signature")
            except (OSError, ValueError):
                old = None
            if old != self.signature:
                raise PartsRefused(f"{self.folder}: these parts belong to a different run "
                                   "(scenario, seed, trajectories or grmc version changed); "
                                   "--resume needs the same ones, or delete the folder to "
                                   "start afresh")
            self.found = len(list(self.folder.glob("chunk_*.pkl")))

    @property
    def exists(self) -> bool:
        """Whether the folder holds saved chunks."""
        return self.folder.is_dir() and any(self.folder.glob("chunk_*.pkl"))

    def count(self) -> int:
        """Chunks saved so far [1]."""
        return len(list(self.folder.glob("chunk_*.pkl"))) if self.folder.is_dir() else 0

    def get(self, chunk: range):
        """The saved accumulators of ``chunk``, or None."""
        path = self.folder / _name(chunk)
        if not path.is_file():
            return None
        try:
            with open(path, "rb") as fh:
                return pickle.load(fh)
        except (OSError, EOFError, pickle.UnpicklingError):  # e.g. cut short by a power loss
            return None

    def put(self, chunk: range, acc) -> None:
        """Save the accumulators of a finished ``chunk`` (atomically)."""
        if not self.folder.is_dir():
            self.folder.mkdir(parents=True, exist_ok=True)
            write_text_atomic(self.folder / "manifest.json",
                              json.dumps({"signature": self.signature, "output": str(self.out)}))
        with atomic_target(self.folder / _name(chunk)) as tmp, open(tmp, "wb") as fh:
            pickle.dump(acc, fh, protocol=pickle.HIGHEST_PROTOCOL)

    def remove(self) -> None:
        """Delete the folder (after the output file is written)."""
        shutil.rmtree(self.folder, ignore_errors=True)
