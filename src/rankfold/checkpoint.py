"""Checkpoints: every pass's fold state and position, saved atomically beside the result.

A route is a fixed sequence of passes, each folding blocks into a state
(:func:`rankfold.routes.common.run_pass`), and the route code between passes
is deterministic.  So a run can be resumed by replaying the route: a pass
found complete in the checkpoint returns its saved state without reading; the
pass that was interrupted restores its state and skips the blocks already
folded.  With the same block partition the resumed run performs exactly the
same floating-point operations as an uninterrupted one, so its result is equal
to the last bit.

Layout, beside the result ``RESULT.zarr``::

    .RESULT.zarr.checkpoint/
      manifest.json                 format, source fingerprint, parameters, passes
      lock                          held (flock) by the run using the checkpoint
      pass-002-0000341.state        state of pass 2 after its first 341 blocks

Every file is written under a temporary name, flushed to disk (fsync) and
renamed over its final name, then the folder itself is flushed; the manifest
is replaced only after the state file it names is on disk, and a state file is
deleted only after the manifest stopped naming it.  So the manifest on disk
always describes a state file that is complete, whatever moment a process is
killed or the power fails.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import time

import numpy as np

from rankfold.errors import CheckpointError, OutputError

try:
    import fcntl
except ImportError:  # not POSIX: runs sharing one checkpoint are not kept apart
    fcntl = None

FORMAT_VERSION = 1
MANIFEST = "manifest.json"
LOCK = "lock"
DEFAULT_EVERY = 300.0  # seconds: a lost interval costs at most five minutes of reading


def checkpoint_folder(out: str) -> str:
    """The checkpoint folder of the result store ``out``: ``.NAME.checkpoint`` beside it.

    For an output given as a URL other than ``file://`` (an object store,
    ``memory://``) the folder is on this machine's disk instead, under
    ``$RANKFOLD_CACHE_DIR/checkpoints`` and named after the URL: checkpoints
    rely on a lock file, fsync and atomic renames, which object stores lack.
    """
    from rankfold.machine import cache_folder
    from rankfold.sources.location import is_url, local_or_url

    out = local_or_url(os.fspath(out))
    if is_url(out):
        name = out.rstrip("/").rsplit("/", 1)[-1]
        digest = hashlib.sha256(out.encode()).hexdigest()[:16]
        return os.path.join(cache_folder(), "checkpoints", f"{name}-{digest}")
    parent, name = os.path.split(os.path.abspath(out))
    return os.path.join(parent, f".{name}.checkpoint")


def partition_digest(partition) -> str:
    """A short digest of a partition's axis and block bounds, to detect a different cut."""
    bounds = np.asarray(partition.bounds, dtype=np.int64)
    h = hashlib.sha256(partition.axis.encode() + bounds.tobytes())
    return h.hexdigest()[:16]


class Checkpointer:
    """The checkpoint of one run: opened (or found) before the first pass, removed after the result.

    Parameters
    ----------
    folder : str
        The checkpoint folder (:func:`checkpoint_folder`).
    manifest : dict
        Its manifest, loaded or new.
    every : float
        Seconds between saves within a pass; 0 saves after every block.
    lock_fd : int
        Open descriptor holding the folder's lock.
    """

    def __init__(self, folder: str, manifest: dict, every: float, lock_fd: int | None, clock=time.monotonic):
        self.folder = folder
        self.manifest = manifest
        self.every = float(every)
        self.clock = clock
        self._lock_fd = lock_fd
        self._ordinal = 0
        self.frozen_at: int | None = None  # ordinal of the first pass that cannot be resumed
        self.found = bool(manifest.get("passes"))  # an earlier run left work to reuse

    # -- opening ------------------------------------------------------------------------------

    @classmethod
    def open(cls, out: str, parameters: dict, fingerprint: dict, every: float = DEFAULT_EVERY,
             restart: bool = False) -> "Checkpointer":
        """Find the checkpoint of ``out`` and check it belongs to this run, or start one.

        Raises
        ------
        CheckpointError
            When the checkpoint was written for another source or other
            parameters (the message lists the differences), when another run
            holds it, or when its manifest is unreadable.
        OutputError
            When the folder cannot be created.
        """
        folder = checkpoint_folder(out)
        try:
            os.makedirs(folder, exist_ok=True)
            lock_fd = _lock(folder)
        except OSError as exc:
            raise OutputError(f"{folder}: cannot create the checkpoint ({exc.strerror or exc})") from None
        try:
            parameters = _plain(parameters)
            fingerprint = _plain(fingerprint)
            path = os.path.join(folder, MANIFEST)
            if restart:
                _clear(folder)
            manifest = None
            if os.path.exists(path):
                manifest = _read_manifest(path, folder)
                changes = _differences(manifest, parameters, fingerprint)
                if changes:
                    raise CheckpointError(
                        f"{folder} holds a checkpoint of a different run: " + "; ".join(changes)
                        + ". Rerun the earlier command to resume it, or add --restart (restart=True) to "
                        "discard it and start over")
            if manifest is None:
                from rankfold import __version__

                manifest = {"format": FORMAT_VERSION, "rankfold": __version__, "source": fingerprint,
                            "parameters": parameters, "resolved": None, "passes": []}
                try:
                    _write_json(folder, MANIFEST, manifest)
                except OSError as exc:
                    raise _write_error(folder, exc) from None
            return cls(folder, manifest, every, lock_fd)
        except BaseException:
            _unlock(lock_fd)
            raise

    @property
    def resolved(self) -> dict | None:
        """Route and memory limit the first run settled on (None before it did)."""
        return self.manifest.get("resolved")

    def settle(self, route: str, memory_limit: int, passes: int) -> None:
        """Record the route, the effective memory limit and the planned number of passes."""
        if self.resolved is None:
            self.manifest["resolved"] = {"route": route, "memory_limit": int(memory_limit),
                                         "passes": int(passes)}
            self._write_manifest()

    def resume_message(self) -> str | None:
        """Where a found checkpoint resumes ("pass 2 of 4, block 342 of 1,000"), or None."""
        passes = self.manifest.get("passes") or []
        if not passes:
            return None
        total = max(int((self.resolved or {}).get("passes") or 0), len(passes))
        done = [p for p in passes if p["complete"]]
        current = next((p for p in passes if not p["complete"]), None)
        where = f"resuming from the checkpoint in {self.folder}: "
        if current is None:
            nxt = len(done) + 1
            if nxt > total:
                return where + f"all {len(done)} pass(es) done; finishing without reading the data again"
            return where + f"{len(done)} of {total} passes done; starting pass {nxt} of {total}"
        return where + (f"pass {current['ordinal']} of {total} ({current['name']}), block "
                        f"{current['blocks_done'] + 1:,} of {current['blocks']:,}")

    # -- passes ---------------------------------------------------------------------------------

    @property
    def ordinal(self) -> int:
        """Number of the pass begun last, counting from 1 (passes restored whole included)."""
        return self._ordinal

    def begin_pass(self, name: str, partition, resumable: bool = True) -> "PassCursor | None":
        """The next pass of the route: its saved entry when the checkpoint has one.

        Returns None for a pass whose state cannot be resumed (it sends data
        outside itself, :attr:`rankfold.folds.base.FoldState.resumable`) and
        for every pass after it: the checkpoint then keeps the passes before
        it, and a resumed run reads that pass and the later ones again.
        """
        self._ordinal += 1
        passes = self.manifest["passes"]
        if self.frozen_at is not None:
            return None
        if not resumable:
            self.frozen_at = self._ordinal
            if len(passes) >= self._ordinal:
                dropped = passes[self._ordinal - 1:]
                del passes[self._ordinal - 1:]
                self._write_manifest()
                for entry in dropped:
                    if entry.get("state"):
                        try:
                            os.remove(os.path.join(self.folder, entry["state"]))
                        except OSError:
                            pass
            return None
        digest = partition_digest(partition)
        if self._ordinal <= len(passes):
            entry = passes[self._ordinal - 1]
            if (entry["name"], entry["blocks"], entry["partition"]) != (name, len(partition), digest):
                raise CheckpointError(
                    f"{self.folder}: pass {self._ordinal} was saved as {entry['name']!r} over "
                    f"{entry['blocks']:,} blocks, but this run reads {name!r} over {len(partition):,} "
                    "blocks (a different rankfold version or block layout); add --restart "
                    "(restart=True) to discard the checkpoint and start over")
        else:
            entry = {"ordinal": self._ordinal, "name": name, "axis": partition.axis,
                     "blocks": len(partition), "partition": digest, "blocks_done": 0,
                     "complete": False, "state": None, "bytes_read": 0, "seconds": 0.0, "record": None}
            passes.append(entry)
        return PassCursor(self, entry)

    def stopped_unsaved(self, signal_name: str, name: str) -> str:
        """Message for a stop inside a pass that cannot be resumed part-way."""
        kept = self.frozen_at - 1 if self.frozen_at else len(self.manifest["passes"])
        return (f"stopped by {signal_name} in pass {self._ordinal} ({name}), which cannot be resumed "
                f"part-way; {kept} earlier pass(es) are saved in {self.folder}. Run the same command again "
                "to resume from there, or add --restart (restart=True) to start over")

    def total_passes(self) -> int:
        return max(int((self.resolved or {}).get("passes") or 0), len(self.manifest["passes"]))

    # -- ending ---------------------------------------------------------------------------------

    def remove(self) -> None:
        """Delete the checkpoint (the result is complete)."""
        _unlock(self._lock_fd)
        self._lock_fd = None
        shutil.rmtree(self.folder, ignore_errors=True)

    def close(self) -> None:
        """Release the lock; keep the checkpoint for a later run if it holds any work.

        A checkpoint with no saved block (the run failed before its first
        save: a memory limit too small, a bad value in the first block) is
        removed, so that a refused run leaves nothing behind.
        """
        _unlock(self._lock_fd)
        self._lock_fd = None
        if not any(p.get("state") for p in self.manifest.get("passes", [])):
            shutil.rmtree(self.folder, ignore_errors=True)

    # -- writing --------------------------------------------------------------------------------

    def _write_manifest(self) -> None:
        try:
            _write_json(self.folder, MANIFEST, self.manifest)
        except OSError as exc:
            raise _write_error(self.folder, exc) from None

    def _save(self, entry: dict, state, blocks_done: int, bytes_read: int, seconds: float,
              record: dict | None) -> None:
        old = entry["state"]
        if old is None or entry["blocks_done"] != blocks_done:
            name = f"pass-{entry['ordinal']:03d}-{blocks_done:07d}.state"
            try:
                _write_file(self.folder, name, _serializer(state))
            except OSError as exc:
                raise _write_error(self.folder, exc) from None
            entry["state"] = name
        entry.update(blocks_done=int(blocks_done), bytes_read=int(bytes_read), seconds=float(seconds),
                     complete=record is not None, record=record)
        self._write_manifest()
        if old is not None and old != entry["state"]:
            try:  # only now that the manifest names the new file
                os.remove(os.path.join(self.folder, old))
            except OSError:
                pass


class PassCursor:
    """One pass's place in the checkpoint: what is saved, and saving more."""

    def __init__(self, owner: Checkpointer, entry: dict):
        self.owner = owner
        self.entry = entry
        self.last_save = owner.clock()

    @property
    def ordinal(self) -> int:
        return self.entry["ordinal"]

    @property
    def complete(self) -> bool:
        return bool(self.entry["complete"])

    @property
    def blocks_done(self) -> int:
        return int(self.entry["blocks_done"]) if self.entry["state"] else 0

    @property
    def bytes_read(self) -> int:
        return int(self.entry["bytes_read"]) if self.entry["state"] else 0

    @property
    def seconds(self) -> float:
        return float(self.entry["seconds"]) if self.entry["state"] else 0.0

    @property
    def record(self) -> dict | None:
        return self.entry["record"]

    def restore(self, fresh):
        """The saved state, rebuilt as ``fresh``'s class.

        Attributes a state keeps only for messages (feature names, the source
        path) are not serialized; they are taken from ``fresh``.
        """
        path = os.path.join(self.owner.folder, self.entry["state"])
        try:
            with open(path, "rb") as fh:
                payload = fh.read()
            state = type(fresh).from_bytes(payload)
        except Exception as exc:  # a damaged file must say where it is, not end in a traceback
            raise CheckpointError(f"{path}: cannot read the saved state ({type(exc).__name__}: {exc}); "
                                  "add --restart (restart=True) to discard the checkpoint") from None
        for key, value in vars(fresh).items():
            if key not in vars(state):
                setattr(state, key, value)
        return state

    def due(self) -> bool:
        """Whether ``every`` seconds have passed since the last save."""
        return self.owner.clock() - self.last_save >= self.owner.every

    def save(self, state, blocks_done: int, bytes_read: int, seconds: float) -> None:
        """Save the state after ``blocks_done`` blocks of this pass."""
        self.owner._save(self.entry, state, blocks_done, bytes_read, seconds, None)
        self.last_save = self.owner.clock()

    def finish(self, state, record: dict) -> None:
        """Save the finished pass's state and record."""
        self.owner._save(self.entry, state, self.entry["blocks"], record["bytes_read"], record["seconds"],
                         record)

    def stopped_message(self, signal_name: str) -> str:
        total = self.owner.total_passes()
        done = self.entry["blocks_done"]
        return (f"stopped by {signal_name} in pass {self.ordinal} of {total} ({self.entry['name']}) after "
                f"block {done:,} of {self.entry['blocks']:,}; the work so far is saved in "
                f"{self.owner.folder}. Run the same command again to resume from there, or add "
                "--restart (restart=True) to start over")


# -- files --------------------------------------------------------------------------------------

def _serializer(state):
    """How to write ``state``: straight into the file, unless its class has its own ``to_bytes``."""
    from rankfold.folds.base import FoldState

    if isinstance(state, FoldState) and type(state).to_bytes is FoldState.to_bytes:
        return state.write_to
    return state.to_bytes()


def _write_file(folder: str, name: str, payload) -> None:
    """Write ``payload`` (bytes, or a function writing into a file) to ``folder/name`` atomically and durably."""
    final = os.path.join(folder, name)
    tmp = final + ".tmp"
    try:
        with open(tmp, "wb") as fh:
            if callable(payload):
                payload(fh)
            else:
                fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, final)
    except BaseException:
        try:
            os.remove(tmp)
        except OSError:
            pass
        raise
    _fsync_dir(folder)


def _write_json(folder: str, name: str, data: dict) -> None:
    _write_file(folder, name, json.dumps(data, indent=1, sort_keys=True).encode())


def _fsync_dir(folder: str) -> None:
    """Flush the folder's entries, so that a rename survives a power cut."""
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _read_manifest(path: str, folder: str) -> dict:
    try:
        with open(path) as fh:
            manifest = json.load(fh)
        version = manifest["format"]
        manifest["passes"]
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise CheckpointError(f"{path}: unreadable checkpoint manifest ({exc}); add --restart "
                              "(restart=True) to discard the checkpoint") from None
    if version != FORMAT_VERSION:
        raise CheckpointError(f"{folder}: checkpoint format {version} is not the {FORMAT_VERSION} this "
                              "rankfold writes; add --restart (restart=True) to discard it")
    return manifest


def _clear(folder: str) -> None:
    """Remove everything in the checkpoint folder but its lock."""
    for name in os.listdir(folder):
        if name != LOCK:
            path = os.path.join(folder, name)
            if os.path.isdir(path):
                shutil.rmtree(path, ignore_errors=True)
            else:
                os.remove(path)


def _lock(folder: str) -> int:
    """Hold the folder's lock so that two runs never write one checkpoint.

    ``flock`` locks are released by the kernel when the process dies, even by
    SIGKILL, so a stale lock never blocks a resume.
    """
    path = os.path.join(folder, LOCK)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    if fcntl is None:
        return fd
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        holder = os.read(fd, 32).decode(errors="replace").strip() or "unknown"
        os.close(fd)
        if exc.errno in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
            raise CheckpointError(f"{folder}: another rankfold run (process {holder}) is using this "
                                  "checkpoint; wait for it to finish or stop it first") from None
        raise
    os.ftruncate(fd, 0)
    os.write(fd, str(os.getpid()).encode())
    return fd


def _unlock(fd: int | None) -> None:
    if fd is not None:
        try:
            os.close(fd)  # closing releases the flock
        except OSError:
            pass


def _write_error(folder: str, exc: OSError) -> OutputError:
    return OutputError(f"{folder}: cannot save the checkpoint ({exc.strerror or exc}); free some disk "
                       "space and run the same command again: it resumes from the last checkpoint saved")


# -- comparing ------------------------------------------------------------------------------------

def _plain(value):
    """JSON's view of ``value`` (tuples become lists), so saved and new compare equal."""
    return json.loads(json.dumps(value, default=str))


def _differences(manifest: dict, parameters: dict, fingerprint: dict) -> list[str]:
    """What changed between the checkpoint's run and this one, in words."""
    from rankfold import __version__

    changes = []
    if manifest.get("rankfold") != __version__:
        changes.append(f"rankfold version {manifest.get('rankfold')} -> {__version__}")
    saved = manifest.get("parameters") or {}
    for key in sorted(set(saved) | set(parameters)):
        if saved.get(key) != parameters.get(key):
            changes.append(f"{key} {_short(saved.get(key))} -> {_short(parameters.get(key))}")
    old = manifest.get("source") or {}
    for key in sorted(set(old) | set(fingerprint)):
        if old.get(key) != fingerprint.get(key):
            if key == "files":
                changes.append("the source's files changed since the checkpoint (sizes, modification "
                               "times or the set of files)")
            else:
                changes.append(f"source {key} {_short(old.get(key))} -> {_short(fingerprint.get(key))}")
    return changes


def _short(value) -> str:
    text = json.dumps(value)
    return text if len(text) <= 60 else text[:57] + "..."
