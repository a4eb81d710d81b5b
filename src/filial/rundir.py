"""Where a run is written: the file layout, the lock, ``lineage.json``, ``fresh``.

Two kinds of run directory, each known by the file that makes it one of filial's:

A lineage's (:class:`RunDirectory`, written by :class:`~filial.Lineage`)::

    RUN/lineage.json          settings, one record per finished generation, the decision
    RUN/heldout_labels.npy    held-out labels (the report's bootstrap reads them)
    RUN/genG/student.pt       generation G's weights-only state_dict
    RUN/genG/heldout.npy      its held-out outputs
    RUN/genG/targets.*        its outputs on the training set (see filial.store)
    RUN/baseline/NAME/        a baseline trained on the labels: baseline.json, gen0/ (and, for
                              the early-stopped ones, heldout_epochs.npy)
    RUN/baseline/baseline.json, RUN/baseline/gen0/
                              the matched baseline as runs before named baselines wrote it
    RUN/tb/                   TensorBoard runs
    RUN/.lock                 who holds the directory now

A recipe's (:class:`RecipeRunDirectory`, written by ``filial run``): ``RUN/recipe.toml`` (the
resolved recipe, marked as filial's), one lineage per seed in ``RUN/seedS/``, TensorBoard runs
in ``RUN/tb/``.

Everything here that changes a file goes through :mod:`filial._io` (atomic writes). Nothing here
knows about models or loops; other rooms ask this one for paths.
"""

from __future__ import annotations

import errno
import json
import logging
import os
import re
import shutil
import time
import weakref
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from . import distributed
from ._io import RunLock, atomic_write_json, is_temporary, sweep_temporaries
from .errors import InputError, LockedError
from .records import DecisionState, GenerationRecord
from .settings import differences

log = logging.getLogger("filial")

STATE_FILE = "lineage.json"
STATE_FORMAT = "filial.lineage/1"
HELDOUT_LABELS_FILE = "heldout_labels.npy"
CHECKPOINT_FILE = "student.pt"
HELDOUT_FILE = "heldout.npy"
BASELINE_DIR = "baseline"
BASELINE_FILE = "baseline.json"
# Per-sample held-out scores of each epoch an early-stopped baseline evaluated.
BASELINE_EPOCHS_FILE = "heldout_epochs.npy"
TENSORBOARD_DIR = "tb"
RECIPE_FILE = "recipe.toml"
# What a lineage writes in its run directory, and so all that fresh=True deletes.
_WRITTEN_BY_A_LINEAGE = re.compile(r"lineage\.json|heldout_labels\.npy|gen\d+|baseline|tb")


def generation_name(generation: int) -> str:
    """The folder of a generation inside a lineage's run directory.

    >>> generation_name(3)
    'gen3'
    """
    return f"gen{int(generation)}"


def seed_name(seed: int) -> str:
    """The folder of one seed's lineage inside a recipe's run directory."""
    return f"seed{int(seed)}"


def foreign_entries(directory: Path) -> list[Path]:
    """Entries of ``directory`` other than its lock file and the temporaries of atomic writes
    (a process killed while it wrote the run's first file leaves one; the claim sweeps it)."""
    return [p for p in directory.iterdir() if p.name != RunLock.NAME and not is_temporary(p)]


def _unusable_path(directory: Path, exc: OSError, choose: str) -> InputError:
    reason = exc.strerror or str(exc)
    if exc.errno == errno.ENAMETOOLONG:
        reason = "a component of the path is longer than the file system allows (255 bytes)"
    return InputError(
        f"the run directory {directory} cannot be used: {reason}. Choose another one with {choose}."
    )


def refuse_unusable(
    directory: Path, is_ours: Callable[[], bool], identity: str, choose: str
) -> None:
    """Refuse a path that cannot be a run directory: a file, a path the system refuses (too
    long, under a file, unreadable), or a folder that holds other things than a filial run
    (``is_ours()`` False: no ``identity`` file of filial's there). ``choose`` says how to pick
    another (``another run_dir``, ``--run-dir``)."""
    try:
        exists, is_dir = directory.exists(), directory.is_dir()
        if exists and not is_dir:
            raise InputError(f"run_dir {directory} exists and is not a directory")
        if directory.is_symlink() and not exists:
            raise InputError(
                f"run_dir {directory} is a symbolic link to {os.readlink(directory)}, which does "
                f"not exist. Remove the link or choose another one with {choose}."
            )
        used = is_dir and not is_ours() and bool(foreign_entries(directory))
    except OSError as exc:
        raise _unusable_path(directory, exc, choose) from exc
    if used:
        raise InputError(
            f"{directory} is not empty and is not a filial run directory (no {identity}); "
            f"filial will not write into it. Choose another one with {choose}."
        )


@dataclass
class Claim:
    """A run directory locked by this process, and what was found on the way in."""

    directory: Path
    lock: RunLock
    created: bool  # this claim made the folder (so a refusal may remove it again)
    notes: list[str] = field(default_factory=list)  # for the caller to tell the user

    def release(self) -> None:
        self.lock.release()


def claim(directory: Path) -> Claim:
    """Make ``directory`` if needed, lock it (:class:`~filial.errors.LockedError` if a live
    process holds it) and sweep the temporaries of processes that died there."""
    created = not directory.exists()
    try:
        directory.mkdir(parents=True, exist_ok=True)
        lock = RunLock(directory).acquire()
    except LockedError:
        if created:
            shutil.rmtree(directory, ignore_errors=True)
        raise
    except OSError as exc:
        if created:
            shutil.rmtree(directory, ignore_errors=True)
        if exc.errno == errno.ENOSPC:
            raise OSError(
                errno.ENOSPC, f"no space left on the device to create {directory}"
            ) from exc
        raise _unusable_path(directory, exc, "another run directory") from exc
    notes = []
    if lock.previous:
        notes.append(
            f"took over the lock of {directory} left by process {lock.previous.get('pid')}, "
            "which is no longer running"
        )
    for path in sweep_temporaries(directory):
        notes.append(f"removed {path}, a temporary file left by a process that died")
    return Claim(directory, lock, created, notes)


class RunDirectory:
    """One lineage's run directory: its paths and its state file."""

    def __init__(self, root: str | Path) -> None:
        self.root = Path(root)

    def __repr__(self) -> str:
        return f"RunDirectory({str(self.root)!r})"

    # -- paths -------------------------------------------------------------------------------

    @property
    def state_path(self) -> Path:
        return self.root / STATE_FILE

    @property
    def heldout_labels_path(self) -> Path:
        return self.root / HELDOUT_LABELS_FILE

    @property
    def tensorboard_path(self) -> Path:
        return self.root / TENSORBOARD_DIR

    @property
    def baseline_path(self) -> Path:
        """The folder of every baseline (``RUN/baseline``)."""
        return self.root / BASELINE_DIR

    @property
    def baseline_state_path(self) -> Path:
        """The matched baseline's record as runs before named baselines wrote it
        (``RUN/baseline/baseline.json``, its files in ``RUN/baseline/gen0``): still read."""
        return self.baseline_path / BASELINE_FILE

    def baseline(self, name: str) -> RunDirectory:
        """The run directory of the baseline called ``name`` (``RUN/baseline/NAME``)."""
        return RunDirectory(self.baseline_path / name)

    def baseline_record(self, name: str) -> Path:
        return self.baseline_path / name / BASELINE_FILE

    def baseline_epochs(self, name: str) -> Path:
        return self.baseline_path / name / BASELINE_EPOCHS_FILE

    def baseline_entry(self, name: str, entry: str) -> str:
        """A path inside baseline ``name``'s folder as a record names it (relative to the
        lineage's run directory)."""
        return f"{BASELINE_DIR}/{name}/{entry}"

    def generation(self, generation: int) -> Path:
        return self.root / generation_name(generation)

    def checkpoint_entry(self, generation: int) -> str:
        """A generation's checkpoint as its record names it (relative to the run directory)."""
        return f"{generation_name(generation)}/{CHECKPOINT_FILE}"

    def checkpoint(self, generation: int) -> Path:
        return self.root / self.checkpoint_entry(generation)

    def heldout(self, generation: int) -> Path:
        return self.generation(generation) / HELDOUT_FILE

    def recorded(self, entry: str) -> Path:
        """A path a record names (relative to the run directory)."""
        return self.root / entry

    # -- the state file ----------------------------------------------------------------------

    @property
    def is_run(self) -> bool:
        return self.state_path.is_file()

    def refuse_unusable(self) -> None:
        refuse_unusable(self.root, lambda: self.is_run, STATE_FILE, "another run_dir")

    def read_state(self) -> dict[str, Any]:
        """``lineage.json``: ``format``, ``settings``, ``records``, ``decision``."""
        try:
            state = json.loads(self.state_path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise ValueError(f"{self.state_path} cannot be read ({exc})") from exc
        if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
            raise ValueError(f"{self.state_path} is not a filial lineage file ({STATE_FORMAT})")
        return state

    def write_state(
        self,
        settings: dict[str, Any],
        records: list[GenerationRecord],
        decision: DecisionState | None,
    ) -> None:
        """Rewrite ``lineage.json`` atomically (the old file stays whole if this fails)."""
        atomic_write_json(
            self.state_path,
            {
                "format": STATE_FORMAT,
                "settings": settings,
                "records": records,
                "decision": decision,
            },
        )

    def clear(self) -> list[Path]:
        """Delete an earlier lineage's files here (``fresh``): only what a lineage writes, never
        the lock or anything else. Returns what was removed."""
        removed = []
        for entry in self.root.iterdir():
            if _WRITTEN_BY_A_LINEAGE.fullmatch(entry.name):
                shutil.rmtree(entry) if entry.is_dir() else entry.unlink()
                removed.append(entry)
        return removed


class RecipeRunDirectory:
    """The run directory of ``filial run``: the saved recipe and one lineage per seed."""

    def __init__(self, root: str | Path) -> None:
        self.root = Path(root)

    @property
    def recipe_path(self) -> Path:
        return self.root / RECIPE_FILE

    @property
    def tensorboard_path(self) -> Path:
        return self.root / TENSORBOARD_DIR

    def seed(self, seed: int) -> RunDirectory:
        return RunDirectory(self.root / seed_name(seed))

    def seed_tensorboard(self, seed: int) -> Path:
        return self.tensorboard_path / seed_name(seed)

    def seed_folders(self) -> list[Path]:
        """The seed folders that hold a lineage."""
        return [
            entry
            for entry in sorted(self.root.glob("seed*"))
            if entry.is_dir() and (entry / STATE_FILE).is_file()
        ]


# The newest LineageState of each run directory in this process. The run lock is shared within a
# process (a notebook may build a new Lineage while an old one is alive), so this is what keeps an
# older object from overwriting what a newer one wrote.
_NEWEST: dict[str, weakref.ref[LineageState]] = {}


class LineageState:
    """A lineage's records and decision, kept in step with its ``lineage.json``.

    :meth:`open` takes the run directory (locks it, then resumes the run in it or starts one);
    :meth:`commit` writes a new record (the file first: if the write fails, memory still agrees
    with the file and the generation can be finished again); :meth:`follow` is how a rank other
    than 0 takes the records rank 0 has written.
    """

    def __init__(self, run: RunDirectory, settings: dict[str, Any]) -> None:
        self.run = run
        self.settings = settings
        self.records: list[GenerationRecord] = []
        self.decision: DecisionState | None = None
        self.resumed = False  # the run directory held finished generations of these settings
        self.opened = time.strftime("%H:%M:%S")
        self.superseded_by: str | None = None  # a newer state over the same directory
        self._claim: Claim | None = None

    @property
    def done(self) -> bool:
        return bool(self.decision and self.decision.get("stop"))

    def open(self, fresh: bool) -> None:
        """Lock the run directory, then resume or start the run in it.

        Note: several processes. Every rank makes the read-only checks first, so bad settings
        fail on all of them; once all have looked, rank 0 alone takes the lock and resumes or
        starts the run, and the other ranks then read the state it left.
        """
        run = self.run
        run.refuse_unusable()
        is_run = run.is_run
        if is_run and not fresh:
            self._refuse_other_settings(run.read_state())  # before touching anything
        if not distributed.is_distributed():
            self._take(fresh, is_run)
            self._become_newest()
            return
        distributed.barrier()
        distributed.on_rank_zero(
            lambda: self._take(fresh, is_run), f"opening the run directory {run.root}"
        )
        if not distributed.is_main():
            if not run.is_run:
                raise RuntimeError(
                    f"rank {distributed.rank()} finds no {run.state_path}, which rank 0 has "
                    "written: every rank must see the same run directory (one machine, or a "
                    "file system shared by the machines)"
                )
            state = run.read_state()
            self.records, self.decision = list(state["records"]), state.get("decision")
        self._become_newest()

    def _become_newest(self) -> None:
        key = str(self.run.root.resolve())
        older = _NEWEST.get(key)
        previous = older() if older is not None else None
        if previous is not None and previous is not self:
            previous.superseded_by = (
                f"a newer Lineage over the same run directory, made at {self.opened}"
            )
        _NEWEST[key] = weakref.ref(self)

    def check_current(self, what: str) -> None:
        """Refuse ``what`` (finishing a generation, handing one out) for a state that a newer
        Lineage over the same run directory has replaced: its records may be out of date."""
        if self.superseded_by is not None:
            raise InputError(
                f"cannot go on {what}: this Lineage over {self.run.root} (made at "
                f"{self.opened}) was replaced by {self.superseded_by}, which may have finished "
                "generations since; nothing was written. Go on with the newer object (or close() "
                "this one before making a new one)."
            )

    def _take(self, fresh: bool, is_run: bool) -> None:
        """Rank 0's part of :meth:`open`."""
        self._claim = claim(self.run.root)
        for note in self._claim.notes:
            log.warning("%s", note)
        try:
            self._resume_or_start(fresh, is_run)
        except BaseException:
            self.close()
            raise

    def _resume_or_start(self, fresh: bool, is_run: bool) -> None:
        run = self.run
        if fresh and is_run:
            log.warning("fresh=True: deleting the earlier run in %s", run.root)
            run.clear()
            is_run = False
        if not is_run:
            run.write_state(self.settings, self.records, self.decision)
            return
        state = run.read_state()
        changed = self._refuse_other_settings(state)
        if changed:
            log.warning(
                "%s: no generation had finished, so the new settings replace the old (%s)",
                run.root,
                "; ".join(changed),
            )
            run.write_state(self.settings, self.records, self.decision)
            return
        self.records, self.decision = list(state["records"]), state.get("decision")
        self.resumed = bool(self.records)

    def _refuse_other_settings(self, state: dict[str, Any]) -> list[str]:
        """Raise if ``state`` has finished generations under other settings; else return the
        differences (which may then replace the old settings)."""
        changed = differences(state["settings"], self.settings)
        if changed and state["records"]:
            raise InputError(
                f"{self.run.root} holds a run made with other settings, so it cannot be "
                "resumed:\n  "
                + "\n  ".join(changed)
                + "\nUse the run's settings, another run_dir, or fresh=True to start over."
            )
        return changed

    def commit(self, record: GenerationRecord, decision: DecisionState) -> None:
        """Write ``record`` (the newest generation's) and ``decision``, then keep them."""
        self.run.write_state(self.settings, [*self.records, record], decision)
        self.records.append(record)
        self.decision = decision

    def follow(self, index: int, stop: int, finished: int) -> GenerationRecord:
        """A rank other than 0: take rank 0's records from ``lineage.json``, checked against
        its broadcast (``stop``, ``finished`` generations), so that every rank holds the same
        records and leaves the loop at the same generation."""
        state = self.run.read_state()
        records, decision = list(state["records"]), state.get("decision") or {}
        if (
            len(records) != finished
            or records[-1]["generation"] != index
            or bool(decision.get("stop")) != bool(stop)
        ):
            raise RuntimeError(
                f"rank {distributed.rank()} reads {len(records)} finished generations in "
                f"{self.run.state_path}, but rank 0 has just recorded generation {index} of "
                f"{finished}: every rank must see the same run directory (one machine, or a file "
                "system shared by the machines)"
            )
        self.records, self.decision = records, state.get("decision")
        return records[-1]

    def close(self) -> None:
        if self._claim is not None:
            self._claim.release()
