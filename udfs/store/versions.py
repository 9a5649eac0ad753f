"""Archive versions on disk: one writer per path, publication that deletes nothing it has not
verified, and removal of superseded versions after a grace period.

The write protocol (every compress, overwrite and append):

1. **Lock.** The writer takes ``.<name>.rankfold-lock`` beside the archive ``<name>``: an
   exclusive ``flock`` (released by the kernel when its process dies), with the owner's pid and
   host written inside. A second writer fails at once with :class:`ArchiveBusyError`; a lock
   file left by a dead owner is taken over and the takeover logged (logger ``rankfold.write``).
2. **Recover.** Under the lock, leftovers of crashed writes to this path are removed: the
   temporary folders ``.<name>.rankfold-tmp-*`` beside it, and inside the archive the files of
   a version that was never committed (state ``pending`` in the journal, below).
3. **Write.** Every new file goes into a fresh temporary folder beside the archive; it is
   fsynced, and so is the folder.
4. **Publish.** To an absent path: the temporary folder is renamed onto it with
   ``renameat2(RENAME_NOREPLACE)``, which fails if anything appeared there meanwhile. Into an
   existing archive (overwrite or append): the archive folder is opened once and its contents
   verified (a rankfold manifest, and only files the manifest or the journal list); the new
   files, whose names are never used before in that folder, are moved in without replacing
   anything; then ``manifest.json`` is replaced in one atomic rename, the commit point. Nothing
   is deleted at commit.
5. **Sweep.** Files of superseded versions stay, recorded in the journal
   ``.rankfold-versions.json`` with the time they were superseded, until a later write or
   :func:`sweep` removes them after ``GRACE_SECONDS``, so a reader that opened an older
   manifest keeps reading its own files meanwhile.

Readers take every file name from the manifest they opened, and file names are never reused
inside an archive folder (the first version uses the plain names of ``layout``; every later
version inserts its own random token), so a reader sees exactly one version or, once its
files are swept, fails with :class:`ArchiveNotFoundError`.

What holds where: on a local POSIX file system, all of the above. ``flock`` on NFS is
emulated with byte-range locks (Linux NFS clients since 2.6.12), which need a working lock
service; on file systems without ``renameat2`` (e.g. before Linux 3.15, or NFS) the rename onto
an absent path falls back to checking the path first, so an *empty* folder created in the
instant between the check and the rename could be replaced (a non-empty one never is).
Object stores have no atomic rename: this protocol covers local and mounted file systems only.
"""

from __future__ import annotations

import ctypes
import errno
import json
import logging
import os
import re
import shutil
import socket
import stat
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX
    fcntl = None

from ..errors import ArchiveBusyError, ArchiveExistsError, ArchiveNotFoundError, InvalidInputError
from . import layout

__all__ = ["WriteLock", "recover", "sweep", "publish_new", "publish_in_place", "survey",
           "Survey", "open_dir", "new_temp_dir", "fsync_file", "fsync_dir", "rename_noreplace",
           "versioned_name", "new_token", "JOURNAL", "GRACE_SECONDS"]

log = logging.getLogger("rankfold.write")

JOURNAL = ".rankfold-versions.json"
JOURNAL_FORMAT = "rankfold-versions"
# Superseded versions are kept this long (seconds) for readers that opened them.
GRACE_SECONDS = 3600.0
_LEGACY_APPEND_LOCK = ".rankfold-append.lock"
_OWN_TEMPS = re.compile(r"^\.manifest\.json\..+\.tmp$|^\.rankfold-versions\.json\.tmp$")


# -- names ---------------------------------------------------------------------------------------
def new_token() -> str:
    """A random token (12 hex digits) that names the files of one archive version."""
    return uuid.uuid4().hex[:12]


def versioned_name(name: str, token: str) -> str:
    """``columns.parquet`` -> ``columns.<token>.parquet``: the token goes before the suffix."""
    stem, dot, suffix = name.rpartition(".")
    return f"{stem}.{token}.{suffix}" if dot else f"{name}.{token}"


def lock_path(target: Path) -> Path:
    return target.parent / f".{target.name}.rankfold-lock"


def _temp_prefix(target: Path) -> str:
    return f".{target.name}.rankfold-tmp-"


def new_temp_dir(target: Path) -> Path:
    """A fresh temporary folder beside ``target`` (removed by the next write if left behind)."""
    temp = target.parent / f"{_temp_prefix(target)}{new_token()}"
    temp.mkdir()
    return temp


# -- durability ----------------------------------------------------------------------------------
def fsync_file(path: Path | str, *, dir_fd: int | None = None) -> None:
    fd = os.open(path, os.O_RDONLY, dir_fd=dir_fd)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def fsync_dir(path: Path | str) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


_AT_FDCWD = -100
_RENAME_NOREPLACE = 1
try:
    _renameat2 = ctypes.CDLL(None, use_errno=True).renameat2
    _renameat2.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
except (AttributeError, OSError):  # pragma: no cover - libc without renameat2 (glibc < 2.28)
    _renameat2 = None


def rename_noreplace(src: Path | str, dst: Path | str, *, src_dir_fd: int | None = None,
                     dst_dir_fd: int | None = None) -> None:
    """Rename ``src`` to ``dst`` only if ``dst`` does not exist (FileExistsError otherwise).

    Atomic with ``renameat2(RENAME_NOREPLACE)`` (Linux 3.15+, local file systems). Elsewhere a
    file is linked then unlinked (``link`` fails on an existing name: still atomic), and a
    folder is renamed after checking that the name is free: a folder onto a non-empty folder
    or a file always fails, but an empty folder created between the check and the rename is
    replaced.
    """
    if _renameat2 is not None:
        result = _renameat2(_AT_FDCWD if src_dir_fd is None else src_dir_fd, os.fsencode(src),
                            _AT_FDCWD if dst_dir_fd is None else dst_dir_fd, os.fsencode(dst),
                            _RENAME_NOREPLACE)
        if result == 0:
            return
        code = ctypes.get_errno()
        if code not in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP):
            raise OSError(code, os.strerror(code), str(dst))
    if os.path.isdir(src if src_dir_fd is None else f"/proc/self/fd/{src_dir_fd}/{src}"):
        if os.path.lexists(dst if dst_dir_fd is None else f"/proc/self/fd/{dst_dir_fd}/{dst}"):
            raise FileExistsError(errno.EEXIST, "exists", str(dst))
        os.rename(src, dst, src_dir_fd=src_dir_fd, dst_dir_fd=dst_dir_fd)
        return
    os.link(src, dst, src_dir_fd=src_dir_fd, dst_dir_fd=dst_dir_fd, follow_symlinks=False)
    os.unlink(src, dir_fd=src_dir_fd)


# -- the lock ------------------------------------------------------------------------------------
def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class WriteLock:
    """The one-writer lock of the archive path ``target`` (a context manager).

    ``flock`` on ``.<name>.rankfold-lock`` beside the archive, non-blocking: a held lock raises
    :class:`ArchiveBusyError` naming its owner. The kernel releases the lock when its process
    ends, however it ends; a lock file left by such a process is taken over, and the takeover
    logged as a warning on ``rankfold.write``. Release unlinks the file while still holding the
    lock; an acquirer checks that the file it locked is still the one at the path.
    """

    def __init__(self, target: str | os.PathLike):
        self.target = Path(target)
        self.path = lock_path(self.target)
        self._fd: int | None = None

    def acquire(self) -> "WriteLock":
        if fcntl is None:  # pragma: no cover
            raise InvalidInputError("rankfold writes archives only on POSIX systems (it needs flock).")
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except FileNotFoundError:
                raise InvalidInputError(
                    f"The folder {self.target.parent} does not exist; create it first.") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                owner = _read_owner(fd)
                os.close(fd)
                raise ArchiveBusyError(
                    f"Another rankfold write to {self.target} is running ({_describe(owner)}; lock "
                    f"{self.path}). Only one compress, overwrite or append per archive runs at a "
                    "time: wait for it to finish, then try again."
                ) from None
            except OSError as exc:
                os.close(fd)
                raise InvalidInputError(
                    f"Cannot lock {self.path} ({exc.strerror}): the file system does not support "
                    "file locks, which rankfold needs to keep writers apart. Write the archive on "
                    "a local disk, then copy it."
                ) from None
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(self.path))
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)  # the previous holder removed the file as we locked it: again
        previous = _read_owner(fd)
        if previous:
            alive = previous.get("host") == socket.gethostname() and _pid_alive(int(previous.get("pid", -1)))
            log.warning("rankfold: took over the write lock %s of %s, which ended without releasing "
                        "it%s", self.path, _describe(previous),
                        " (a process of that id runs now, but it no longer holds the lock)" if alive else "")
        record = json.dumps({"pid": os.getpid(), "host": socket.gethostname(),
                             "since": time.time()}).encode()
        os.ftruncate(fd, 0)
        os.pwrite(fd, record, 0)
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            os.unlink(self.path)
        except FileNotFoundError:  # pragma: no cover - removed by hand
            pass
        finally:
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> "WriteLock":
        return self.acquire()

    def __exit__(self, *exc) -> None:
        self.release()


def _read_owner(fd: int) -> dict[str, Any]:
    try:
        data = os.pread(fd, 4096, 0)
        owner = json.loads(data.decode("utf-8")) if data.strip() else {}
        return owner if isinstance(owner, dict) else {}
    except (OSError, ValueError):
        return {"pid": "?", "host": "?"}


def _describe(owner: dict[str, Any]) -> str:
    if not owner:
        return "owner unknown"
    since = owner.get("since")
    when = time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(since)) if isinstance(since, (int, float)) else "?"
    return f"process {owner.get('pid', '?')} on host {owner.get('host', '?')}, since {when}"


# -- what is at a path -----------------------------------------------------------------------------
@dataclass
class Survey:
    """What an archive folder (open as ``fd``) holds: ``kind`` is 'empty', 'archive' or
    'foreign'; ``found`` says what, for messages; ``manifest`` and ``journal`` as read."""

    kind: str
    found: str
    entries: list[str] = field(default_factory=list)
    manifest: dict[str, Any] | None = None
    journal: dict[str, Any] = field(default_factory=dict)


def _read_json(fd: int, name: str) -> Any:
    handle = os.open(name, os.O_RDONLY | os.O_NOFOLLOW, dir_fd=fd)
    with os.fdopen(handle, "rb") as stream:
        return json.loads(stream.read().decode("utf-8"))


def _shown(names: list[str], limit: int = 8) -> str:
    shown = ", ".join(sorted(names)[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


def survey(fd: int) -> Survey:
    """Classify the folder open as ``fd``: an empty folder, a rankfold archive (its manifest
    has the rankfold format marker, and every entry is the manifest, a file the manifest or
    the journal lists, or a temporary file of rankfold's own), or anything else."""
    entries = os.listdir(fd)
    if not entries:
        return Survey("empty", "an empty folder")
    if layout.MANIFEST not in entries:
        return Survey("foreign", f"a folder without a rankfold manifest, holding {_shown(entries)}", entries)
    try:
        manifest = _read_json(fd, layout.MANIFEST)
    except (OSError, ValueError):
        return Survey("foreign", f"a folder whose {layout.MANIFEST} is not readable JSON", entries)
    if not isinstance(manifest, dict) or manifest.get("format") != layout.FORMAT_NAME:
        marker = manifest.get("format") if isinstance(manifest, dict) else None
        return Survey("foreign", f"a folder whose {layout.MANIFEST} is not a rankfold manifest "
                                 f"(format {marker!r}, not {layout.FORMAT_NAME!r})", entries)
    journal = _load_journal(fd, entries)
    owned = {layout.MANIFEST, JOURNAL, _LEGACY_APPEND_LOCK}
    owned.update(f.get("name") for f in manifest.get("files", []) if isinstance(f, dict))
    owned.update(journal)
    strangers = []
    for name in entries:
        if name in owned or _OWN_TEMPS.match(name):
            is_file = stat.S_ISREG(os.lstat(name, dir_fd=fd).st_mode)
            if is_file:
                continue
        strangers.append(name)
    if strangers:
        return Survey("foreign", f"a rankfold archive that also holds {_shown(strangers)}, which "
                                 "rankfold did not write", entries, manifest, journal)
    return Survey("archive", "a rankfold archive", entries, manifest, journal)


def _load_journal(fd: int, entries: list[str]) -> dict[str, dict[str, Any]]:
    """The journal's files: name -> {"state": pending | live | superseded, "time": epoch s}."""
    if JOURNAL not in entries:
        return {}
    try:
        data = _read_json(fd, JOURNAL)
    except (OSError, ValueError):
        return {}
    files = data.get("files") if isinstance(data, dict) and data.get("format") == JOURNAL_FORMAT else None
    return {str(k): v for k, v in files.items() if isinstance(v, dict)} if isinstance(files, dict) else {}


def _write_journal(fd: int, files: dict[str, dict[str, Any]]) -> None:
    temp = f"{JOURNAL}.tmp"
    handle = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o644, dir_fd=fd)
    with os.fdopen(handle, "w", encoding="utf-8") as stream:
        json.dump({"format": JOURNAL_FORMAT, "files": files}, stream, indent=1, sort_keys=True)
        stream.flush()
        os.fsync(stream.fileno())
    os.replace(temp, JOURNAL, src_dir_fd=fd, dst_dir_fd=fd)
    os.fsync(fd)


def open_dir(target: Path) -> int | None:
    """``target`` opened as a folder (no symbolic link followed), or None if absent."""
    try:
        return os.open(target, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW)
    except FileNotFoundError:
        return None
    except (NotADirectoryError, OSError) as exc:
        if exc.errno in (errno.ENOTDIR, errno.ELOOP):
            what = "a symbolic link" if os.path.islink(target) else "a file"
            raise ArchiveExistsError(
                f"{target} exists and is not a rankfold archive; refusing to replace it even with "
                f"overwrite=True: it is {what}. Remove it yourself or choose another path.") from None
        raise


# -- recovery and sweeping -----------------------------------------------------------------------
def recover(target: str | os.PathLike, *, grace: float = GRACE_SECONDS) -> list[str]:
    """Under the write lock: remove the leftovers of crashed writes to ``target`` and the
    files of versions superseded more than ``grace`` seconds ago. Returns what was removed."""
    target = Path(target)
    removed = []
    if target.parent.is_dir():
        prefix = _temp_prefix(target)
        for entry in os.scandir(target.parent):
            if entry.name.startswith(prefix) and entry.is_dir(follow_symlinks=False):
                shutil.rmtree(entry.path, ignore_errors=True)
                removed.append(entry.name)
    fd = open_dir(target) if target.exists() or target.is_symlink() else None
    if fd is not None:
        try:
            found = survey(fd)
            if found.manifest is not None and found.manifest.get("format") == layout.FORMAT_NAME:
                removed += [f"{target.name}/{n}" for n in _sweep_inside(fd, found, grace)]
        finally:
            os.close(fd)
    if removed:
        log.info("rankfold: removed leftovers and superseded files of %s: %s", target, ", ".join(removed))
    return removed


def _sweep_inside(fd: int, found: Survey, grace: float) -> list[str]:
    live = {f["name"] for f in found.manifest.get("files", []) if isinstance(f, dict)}
    now = time.time()
    journal = dict(found.journal)
    removed = []
    for name, entry in list(journal.items()):
        if name in live:
            if entry.get("state") != "live":
                journal[name] = {"state": "live", "time": now}
            continue
        state = entry.get("state")
        if state == "live":  # the manifest moved on but the journal was not updated (a crash)
            journal[name] = {"state": "superseded", "time": now}
            continue
        expired = state == "pending" or (state == "superseded" and now - float(entry.get("time", now)) >= grace)
        if not expired:
            continue
        try:
            os.unlink(name, dir_fd=fd)
            removed.append(name)
        except FileNotFoundError:
            pass
        del journal[name]
    for name in found.entries:
        if _OWN_TEMPS.match(name) or name == _LEGACY_APPEND_LOCK:
            try:
                os.unlink(name, dir_fd=fd)
                removed.append(name)
            except FileNotFoundError:  # pragma: no cover
                pass
    if journal != found.journal:
        _write_journal(fd, journal)
    return removed


def sweep(path: str | os.PathLike, *, grace: float = GRACE_SECONDS) -> list[str]:
    """Housekeeping of the archive at ``path``: take its write lock, then remove leftovers of
    crashed writes and the files of versions superseded more than ``grace`` seconds ago (a
    reader still holding such a version then fails with ArchiveNotFoundError). Returns the
    names removed. Raises ArchiveBusyError while a write runs."""
    target = Path(path)
    if grace < 0:
        raise InvalidInputError(f"grace is a number of seconds, at least 0; got {grace!r}.")
    if not target.is_dir():
        raise ArchiveNotFoundError(f"No archive at {target}. Check the path.")
    with WriteLock(target):
        return recover(target, grace=grace)


# -- publication ---------------------------------------------------------------------------------
def _sync_folder(folder: Path, names: list[str]) -> None:
    for name in names:
        fsync_file(folder / name)
    fsync_dir(folder)


def publish_new(temp: Path, target: Path) -> None:
    """Move the finished folder ``temp`` (manifest included) onto the absent path ``target``;
    raises ArchiveExistsError, leaving ``temp`` in place, if anything appeared there."""
    _sync_folder(temp, sorted(os.listdir(temp)))
    try:
        rename_noreplace(temp, target)
    except OSError as exc:
        if exc.errno not in (errno.EEXIST, errno.ENOTEMPTY, errno.ENOTDIR, errno.EISDIR):
            raise
        raise ArchiveExistsError(
            f"{target} appeared while rankfold was writing an archive there ({_what_is(target)}); "
            "it was left untouched and the new archive discarded. Choose another path, or remove "
            "it and compress again."
        ) from None
    fsync_dir(target.parent)


def _what_is(target: Path) -> str:
    if target.is_symlink():
        return "a symbolic link"
    if target.is_dir():
        fd = open_dir(target)
        try:
            return survey(fd).found
        finally:
            os.close(fd)
    return "a file" if target.exists() else "now gone again"


def publish_in_place(target: Path, temp: Path, new_files: list[str], *,
                     expect: dict[str, Any] | None) -> None:
    """Commit the version staged in ``temp`` (``new_files`` and its ``manifest.json``) into the
    existing folder ``target``.

    ``target`` must be, at this moment, an empty folder or a rankfold archive holding nothing
    else; with ``expect`` (a manifest), that very version (same archive_id and version). The
    new files move in without replacing anything, then the manifest replaces the old one
    atomically; the old version's files are marked superseded in the journal (removed after
    the grace period). On a refusal the archive's version is unchanged.
    """
    _sync_folder(temp, new_files + [layout.MANIFEST])
    fd = open_dir(target)
    if fd is None:
        raise ArchiveNotFoundError(f"The archive {target} disappeared during the write; nothing was written.")
    try:
        found = _verified(fd, target, expect)
        journal = dict(found.journal)
        now = time.time()
        # the journal knows every file of the old version before the commit, so that after a
        # crash past the commit point they are still recognised as the archive's own
        for entry in (found.manifest or {}).get("files", []):
            if isinstance(entry, dict) and entry.get("name") not in journal:
                journal[entry["name"]] = {"state": "live", "time": now}
        for name in new_files:
            if name in found.entries:
                raise ArchiveExistsError(f"{target} already holds {name}; nothing was written.")
            journal[name] = {"state": "pending", "time": now}
        _write_journal(fd, journal)
        for name in new_files:
            rename_noreplace(temp / name, name, dst_dir_fd=fd)
        os.fsync(fd)
        _check_unchanged(fd, target, found)
        os.replace(temp / layout.MANIFEST, layout.MANIFEST, dst_dir_fd=fd)  # the commit point
        os.fsync(fd)
        new_live = {f["name"] for f in _read_json(fd, layout.MANIFEST)["files"]}
        old_live = {f["name"] for f in (found.manifest or {}).get("files", []) if isinstance(f, dict)}
        now = time.time()
        for name in set(journal) | old_live:
            if name in new_live:
                journal[name] = {"state": "live", "time": now}
            elif (journal.get(name) or {}).get("state") != "superseded":
                journal[name] = {"state": "superseded", "time": now}
        _write_journal(fd, journal)
    finally:
        os.close(fd)
    try:
        temp.rmdir()
    except OSError:  # pragma: no cover - the next write removes it
        pass


def _verified(fd: int, target: Path, expect: dict[str, Any] | None) -> Survey:
    """Survey ``fd``: refuse anything but an empty folder or a rankfold archive (with
    ``expect``: the archive of that manifest's archive_id and version)."""
    found = survey(fd)
    if found.kind == "foreign":
        raise ArchiveExistsError(
            f"{target} exists and is not a rankfold archive; refusing to replace it: it is "
            f"{found.found}. rankfold replaces only a rankfold archive with nothing else inside "
            "(or an empty folder), and left it untouched. Move your files out, or choose another path.")
    if expect is None:
        return found
    if found.kind != "archive" or (found.manifest.get("archive_id"), found.manifest.get("version", 0)) != (
            expect.get("archive_id"), expect.get("version", 0)):
        raise ArchiveExistsError(
            f"{target} changed during this write (it is now {found.found}"
            f"{'' if found.kind != 'archive' else ' of another version'}); it was left as it is and "
            "this write discarded. Open it again and retry.")
    return found


def _check_unchanged(fd: int, target: Path, found: Survey) -> None:
    """Just before the commit rename: the manifest about to be replaced is the one verified."""
    try:
        now = _read_json(fd, layout.MANIFEST)
    except FileNotFoundError:
        now = None
    except (OSError, ValueError):
        now = "unreadable"
    if now != found.manifest:
        raise ArchiveExistsError(
            f"The manifest of {target} changed during this write; the folder was left with its "
            "current manifest and this write discarded (its files are removed by the next write).")
