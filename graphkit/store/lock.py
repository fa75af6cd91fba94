"""The store's writer lock and its durable renames.

Every catalog writer holds :func:`store_lock` (``fcntl.flock`` on ``STORE/.lock``); every rename in the store goes
through :func:`replace_durably` (rename, then an fsync of the folders involved).
"""

from __future__ import annotations

import fcntl
import os
import threading
import time
from contextlib import contextmanager
from pathlib import Path

from ..errors import StoreError

__all__ = ["store_lock", "check_store_writable", "replace_durably", "fsync_dir", "WRITERS"]

_LOCK = ".lock"


#: Seconds a writer that finds the lock taken keeps re-reading the holder's pid when the lock file names no
#: live process yet: the winner of a simultaneous start writes its pid a moment after taking the lock.
_HOLDER_SETTLE_SECONDS = 1.0

# The locks this process holds, by resolved store path: [pid, fd, depth]. The lock is re-entrant within the
# process that holds it (a refresh holds it for the whole run; the publish inside takes it again), and a forked
# child, whose pid differs, does not inherit the ownership.
_HELD: dict[str, list] = {}
_HELD_GUARD = threading.Lock()
# Catalog writers of one process take turns too (the flock cannot tell its threads apart): a promote in a notebook
# thread while a refresh publishes in another, say.
WRITERS = threading.RLock()


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, another user's
        return True
    return True


def _lock_holder(fd) -> tuple[int, str] | None:
    """(pid, purpose) the lock file names, when that process is alive; None otherwise."""
    pid_text, _, purpose = os.pread(fd, 256, 0).decode(errors="replace").strip().partition(" ")
    if not pid_text.isdigit() or not _pid_alive(int(pid_text)):
        return None
    return int(pid_text), purpose.strip() or "writer"


def _held_message(store, holder, waited: float) -> str:
    after = f" after waiting {waited:g} s" if waited > 0 else ""
    if holder is None:
        return (f"{store}: another writer holds the store lock (its process is unknown){after}; "
                "wait for it to finish")
    pid, purpose = holder
    return f"{store}: another {purpose} holds the store lock (pid {pid}){after}; wait for it to finish"


def _take_flock(fd, store, wait: float) -> None:
    """Take the flock on ``fd``, waiting up to ``wait`` seconds, or raise ``StoreError`` naming the holder.

    The holder is named only when the lock file holds the pid of a live process; a pid left by a dead writer, or
    no pid yet (the holder took the lock a moment ago), is re-read for up to ``_HOLDER_SETTLE_SECONDS``, after
    which the holder is reported as unknown rather than wrongly.
    """
    start = time.monotonic()
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            pass
        _refuse_when_due(store, _lock_holder(fd), start, wait)
        time.sleep(0.02)


def _refuse_when_due(store, holder, start: float, wait: float) -> None:
    """Raise ``StoreError`` naming ``holder`` once ``wait`` seconds have passed since ``start`` and the holder is
    known, or ``_HOLDER_SETTLE_SECONDS`` have passed without it being known."""
    elapsed = time.monotonic() - start
    if elapsed >= wait and (holder is not None or elapsed >= _HOLDER_SETTLE_SECONDS):
        raise StoreError(_held_message(store, holder, wait)) from None


def _held_here(store: Path):
    entry = _HELD.get(str(store.resolve()))
    return entry if entry is not None and entry[0] == os.getpid() else None


@contextmanager
def store_lock(store, *, wait: float = 0.0, purpose: str = "refresh"):
    """Hold the store's writer lock (``fcntl.flock`` on ``STORE/.lock``) or raise ``StoreError`` naming its owner.

    Every catalog writer holds it: a refresh for its whole run, and publish, a failed run's record, promote,
    pin and retention for their catalog switch. It is re-entrant within the process that holds it, so these
    functions work both inside a run and on their own.

    Parameters
    ----------
    store : path
        The store folder (created if needed).
    wait : float
        Seconds to wait for another writer to finish before giving up (default 0: refuse at once).
    purpose : str
        What the holder is doing, recorded beside its pid for the message a refused writer gets.
    """
    store = Path(store)
    store.mkdir(parents=True, exist_ok=True, mode=0o755)
    path = store / _LOCK
    key = str(store.resolve())
    start, outer = time.monotonic(), False
    while True:
        # Taking and releasing happen under one guard, so that another thread of this process never sees the
        # flock taken but not yet registered (or unregistered but not yet released) and refuses itself.
        with _HELD_GUARD:
            entry = _held_here(store)
            if entry is not None:
                entry[2] += 1
                break
            try:
                fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o644)
            except OSError as exc:  # ELOOP: a symlink planted where the lock belongs is never followed
                raise StoreError(f"{path}: cannot open the store lock ({exc.strerror}); a symlink there is "
                                 "refused") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _lock_holder(fd)
                os.close(fd)
            else:
                os.ftruncate(fd, 0)
                os.pwrite(fd, f"{os.getpid()} {purpose}".encode(), 0)
                entry = [os.getpid(), fd, 1]
                _HELD[key] = entry
                outer = True
                break
        _refuse_when_due(store, holder, start, float(wait))
        time.sleep(0.02)
    old_mask = os.umask(0o022) if outer else None  # nothing in the store is group- or world-writable
    try:
        yield
    finally:
        with _HELD_GUARD:
            entry[2] -= 1
            if entry[2] == 0:  # the last holder in this process releases the flock
                if _HELD.get(key) is entry:
                    del _HELD[key]
                os.ftruncate(entry[1], 0)  # a released lock names nobody, so a later refusal cannot name a stale pid
                os.close(entry[1])  # closing releases the flock; a killed owner's lock vanishes with its process
        if old_mask is not None:
            os.umask(old_mask)


def check_store_writable(store) -> None:
    """Fail fast, before a run starts, on a store path that cannot work or a store another writer holds.

    Only looks: creates nothing. The run takes the lock for real later (:func:`store_lock`); this check is for a
    clear error within seconds instead of after the run has started.
    """
    store = Path(store)
    if store.exists() and not store.is_dir():
        raise StoreError(f"{store}: [store] path names a file, not a folder")
    existing = next((p for p in [store, *store.parents] if p.exists()), None)
    if existing is not None and not os.access(existing, os.W_OK | os.X_OK):
        raise StoreError(f"{existing}: no permission to write the store here")
    path = store / _LOCK
    if not path.exists() or path.is_symlink() or _held_here(store) is not None:
        return
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return  # store_lock gives the precise error
    try:
        _take_flock(fd, store, 0.0)
    finally:
        os.close(fd)


def fsync_dir(folder) -> None:
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def replace_durably(src, dst) -> None:
    """``os.replace`` followed by an fsync of the folders involved, so the rename itself survives a power cut."""
    src, dst = Path(src), Path(dst)
    os.replace(src, dst)
    fsync_dir(dst.parent)
    if src.parent.resolve() != dst.parent.resolve():
        fsync_dir(src.parent)

