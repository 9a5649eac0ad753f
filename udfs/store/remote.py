"""Archives on object storage: any fsspec URL (``s3://bucket/prefix``, ``gs://...``, ...).

The rest of the code works on local directories; this module is the one place that moves an
archive between a local directory and a store, through fsspec file systems:

* ``RemoteTarget`` (compress): checks the target before any work, and ``publish`` uploads a
  finished local archive, every data file first and ``manifest.json`` last.
* ``Staging`` and ``StagedUpload`` (compress on Dask): workers stream their row files and
  exact-cell files straight to a private staging prefix inside the target, hashing the bytes
  as they go; the client then moves them to their final names (``RemoteTarget.adopt``: a
  server-side copy where the store has one), uploads the small tables and the manifest last.
* ``fetch`` (open, rebuild, SQL): downloads an archive to a private local directory,
  ``manifest.json`` first, then exactly the files it lists, and removes that copy when the
  object holding it is garbage-collected (or at exit).

What a store guarantees here (no atomic rename on object storage): the manifest is the only
pointer to an archive. A reader that finds no manifest finds no archive; a compress that
fails before its last upload leaves data files without a manifest, which nothing reads (and
which compress refuses to write over: remove the prefix, or choose another). A Dask compress
(``build/store_writer.py``) removes, on a failure it sees, the objects it wrote (checked to
be still its own); one killed outright leaves them, as above. An existing
archive is never replaced on a store (``overwrite=True`` is refused there): without an
atomic rename, replacing it would expose a mix of old and new files. A fetched file whose
size differs from the manifest's entry is refused (and with ``checksums=True`` the reader
checks every SHA-256), so a copy that raced another writer is detected, not read.

Credentials and endpoints: ``storage_options`` (fsspec options, e.g. ``{"key": ..., "secret":
..., "endpoint_url": ...}`` for s3fs), or the store's usual environment variables
(``AWS_ACCESS_KEY_ID``, ``AWS_SECRET_ACCESS_KEY``, ``AWS_ENDPOINT_URL`` for S3).
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import tempfile
import uuid
import weakref
from pathlib import Path
from typing import Any

from ..errors import ArchiveExistsError, ArchiveNotFoundError, CorruptArchiveError, InvalidInputError
from . import layout
from .integrity import FOOTER_TRAILER_BYTES, footer_length

__all__ = ["is_url", "filesystem", "RemoteTarget", "Staging", "StagedUpload", "fetch", "LocalCopy"]


def is_url(path: Any) -> bool:
    """An fsspec URL (s3://, gs://, memory://, ...) rather than a local path."""
    return isinstance(path, str) and "://" in path and not path.startswith("file://")


def filesystem(url: str, storage_options: dict | None = None):
    """(fsspec file system, path inside it) for ``url``."""
    try:
        import fsspec.core
    except ImportError:  # pragma: no cover - fsspec comes with pyarrow's optional stack
        raise InvalidInputError(
            f"Reading or writing {url} needs fsspec and the store's driver (s3fs for s3://); "
            "install them with pip install 'rankfold[dask]' s3fs."
        ) from None
    try:
        fs, root = fsspec.core.url_to_fs(url, **(storage_options or {}))
    except (ImportError, ValueError) as exc:
        raise InvalidInputError(
            f"No file system for {url}: {exc}. Install the store's fsspec driver (s3fs for "
            "s3://, gcsfs for gs://) or check the URL."
        ) from None
    return fs, root.rstrip("/")


class RemoteTarget:
    """An archive to be written at a store URL: checked at once, published last."""

    def __init__(self, url: str, storage_options: dict | None, overwrite: bool):
        self.url = url.rstrip("/")
        self.fs, self.root = filesystem(url, storage_options)
        if overwrite:
            raise InvalidInputError(
                f"overwrite=True is not supported for {url}: object storage has no atomic "
                "rename, so replacing an archive in place would expose a mix of old and new "
                "files. Write to a new prefix, or delete the old archive first."
            )
        if self.fs.exists(f"{self.root}/{layout.MANIFEST}"):
            raise ArchiveExistsError(
                f"{url} already holds an archive; rankfold never replaces data unasked. "
                "Choose another prefix."
            )
        if self.fs.exists(self.root) and self.fs.find(self.root):
            raise ArchiveExistsError(
                f"{url} already holds objects (without a manifest: perhaps an upload that "
                "failed). rankfold writes archives only to empty prefixes; remove them or "
                "choose another prefix."
            )

    def new_staging(self) -> "Staging":
        """A private staging prefix for this write, inside the target: ``.rankfold-staging-``
        and a new random token (no archive file starts with a dot, and readers follow only
        the manifest). Checked empty now, so every object under it later is this write's."""
        staging = Staging(self.fs, f"{self.root}/{STAGING_PREFIX}{uuid.uuid4().hex}")
        if staging.objects():
            raise ArchiveExistsError(f"{self.url}/{staging.prefix.rsplit('/', 1)[1]} is not empty; "
                                     "rankfold does not stage into objects it did not write.")
        return staging

    def put(self, local: Path, name: str) -> dict[str, Any]:
        """Upload the local file ``local`` as ``name``; returns the object's identity
        (``identity``), for :meth:`remove_own`."""
        self.fs.put_file(str(local), f"{self.root}/{name}")
        return self.identity(name)

    def adopt(self, staged: str, name: str, size: int) -> dict[str, Any]:
        """Move the staged object ``staged`` (a path inside the file system) to ``name``: a
        copy inside the store (S3: a server-side copy, no bytes through the client), checked
        against the size the writer measured, then the staged object is removed. Returns the
        new object's identity."""
        final = f"{self.root}/{name}"
        self.fs.copy(staged, final)
        identity = self.identity(name)
        if identity.get("size") != size:
            raise CorruptArchiveError(
                f"{self.url}/{name} holds {identity.get('size')} bytes after the copy from "
                f"{staged}, where {size} were written; another writer may be using this prefix. "
                "The archive was not committed.")
        self.fs.rm_file(staged)
        return identity

    def identity(self, name: str) -> dict[str, Any]:
        """Size and entity tag (or modification time) of the object ``name``: what
        :meth:`remove_own` compares before it removes anything."""
        self.fs.invalidate_cache(f"{self.root}/{name}")
        info = self.fs.info(f"{self.root}/{name}")
        return {k: info.get(k) for k in ("size", "ETag", "LastModified", "mtime")}

    def remove_own(self, written: dict[str, dict[str, Any]]) -> None:
        """Remove the objects this write created (``written``: name -> identity recorded
        right after the write), each only if it still is the object written (same size and
        entity tag): never the manifest, never anything else."""
        for name, identity in written.items():
            if name == layout.MANIFEST:
                continue
            try:
                if self.identity(name) == identity:
                    self.fs.rm_file(f"{self.root}/{name}")
            except FileNotFoundError:
                pass

    def has_manifest(self) -> bool:
        self.fs.invalidate_cache(self.root)
        return self.fs.exists(f"{self.root}/{layout.MANIFEST}")

    def publish(self, local: Path) -> str:
        """Upload the archive in ``local``: the files its manifest lists, then the manifest
        (the commit point). Returns the URL."""
        manifest = json.loads((local / layout.MANIFEST).read_text())
        for entry in manifest.get("files", []):
            name = entry["name"]
            self.fs.put_file(str(local / name), f"{self.root}/{name}")
        self.fs.put_file(str(local / layout.MANIFEST), f"{self.root}/{layout.MANIFEST}")
        return self.url


STAGING_PREFIX = ".rankfold-staging-"
# Names a compress stages (``compress._encode_task``): partition row files and cell files.
STAGED_NAME = re.compile(r"\.(part-\d{5}-\d{4}|cells-\d{5})\.parquet")
# Bytes of the stream kept to read the Parquet footer from (larger footers are read back).
_TAIL_BYTES = 1 << 20


class Staging:
    """A private prefix on a store where Dask workers write a compress's files; picklable
    (the fsspec file system travels with it), and stateless, so that tasks sharing one copy
    in one process do not interfere. Every object under it was written by this compress
    (``RemoteTarget.new_staging`` checked it empty, and the token is random)."""

    def __init__(self, fs, prefix: str):
        self.fs, self.prefix = fs, prefix

    def path(self, name: str) -> str:
        return f"{self.prefix}/{name}"

    def open(self, name: str) -> "StagedUpload":
        """A write-only file object that streams ``name`` to the store."""
        return StagedUpload(self.fs, self.path(name))

    def open_parquet(self, name: str):
        """A readable file object of the staged ``name`` (for pyarrow)."""
        return self.fs.open(self.path(name), "rb")

    def objects(self) -> list[str]:
        self.fs.invalidate_cache(self.prefix)
        try:
            return list(self.fs.find(self.prefix))
        except FileNotFoundError:
            return []

    def remove(self) -> None:
        """Remove what this compress staged: the objects under the prefix with a name this
        compress writes (``STAGED_NAME``). Anything else found there is left in place."""
        for path in self.objects():
            if path.startswith(self.prefix + "/") and STAGED_NAME.fullmatch(path[len(self.prefix) + 1:]):
                try:
                    self.fs.rm_file(path)
                except FileNotFoundError:
                    pass


class StagedUpload:
    """A write-only binary file object that streams to ``path`` on a store (fsspec's buffered
    upload: S3 multipart parts of ``block_size`` bytes), and measures what it writes: size,
    SHA-256, and for a Parquet file the SHA-256 of its footer (the last footer length + 8
    bytes, as ``integrity.footer_sha256`` reads them from a local file). Memory: one upload
    part plus the last ``_TAIL_BYTES`` written. ``close`` commits the object; ``discard``
    abandons it (an aborted multipart upload leaves no object)."""

    BLOCK_SIZE = 8 << 20

    def __init__(self, fs, path: str):
        self.fs, self.path = fs, path
        self._file = fs.open(path, "wb", block_size=self.BLOCK_SIZE)
        self._sha = hashlib.sha256()
        self._tail = bytearray()
        self.size = 0
        self.closed = False
        self.record: dict[str, Any] | None = None

    def writable(self) -> bool:
        return True

    def write(self, data) -> int:
        view = memoryview(data).cast("B")
        self._file.write(view)
        self._sha.update(view)
        self.size += view.nbytes
        self._tail += view[-_TAIL_BYTES:]
        if len(self._tail) > 2 * _TAIL_BYTES:
            del self._tail[:-_TAIL_BYTES]
        return view.nbytes

    def tell(self) -> int:
        return self.size

    def flush(self) -> None:
        """Nothing: the upload sends whole parts (``close`` sends the rest)."""

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        self._file.close()
        self._file = None  # a closed upload keeps only its figures (and pickles)
        footer = self._footer_sha256() if self.path.endswith(".parquet") else None
        self.record = {"bytes": self.size, "sha256": self._sha.hexdigest(), "footer_sha256": footer}
        self._sha, self._tail = None, bytearray()

    def discard(self) -> None:
        if not self.closed:
            self.closed = True
            discard = getattr(self._file, "discard", None)
            if discard is not None:
                discard()
            self._file, self._sha, self._tail = None, None, bytearray()

    def _footer_sha256(self) -> str:
        tail = bytes(self._tail)
        length = footer_length(tail[-FOOTER_TRAILER_BYTES:], self.size)
        if length is None:
            raise CorruptArchiveError(f"{self.path} does not end with a Parquet footer.")
        if length + FOOTER_TRAILER_BYTES <= len(tail):
            footer = tail[-(length + FOOTER_TRAILER_BYTES):]
        else:  # a footer beyond the kept tail: read it back
            footer = self.fs.cat_file(self.path, start=self.size - length - FOOTER_TRAILER_BYTES,
                                      end=self.size)
        return hashlib.sha256(footer).hexdigest()


class LocalCopy:
    """A private local directory holding a fetched archive; removed by :meth:`cleanup`, when
    this object is garbage-collected, or at exit (``weakref.finalize``)."""

    def __init__(self) -> None:
        self.directory = Path(tempfile.mkdtemp(prefix="rankfold-fetch-"))
        self.path = self.directory / "archive"
        self._finalizer = weakref.finalize(self, shutil.rmtree, str(self.directory), True)

    def cleanup(self) -> None:
        self._finalizer()


def fetch(url: str, storage_options: dict | None = None) -> LocalCopy:
    """Download the archive at ``url`` into a new private directory (manifest first, then
    the files it lists; sizes checked against the manifest)."""
    fs, root = filesystem(url, storage_options)
    manifest_path = f"{root}/{layout.MANIFEST}"
    if not fs.exists(manifest_path):
        raise ArchiveNotFoundError(
            f"No rankfold archive at {url} (no {layout.MANIFEST}); check the URL and credentials."
        )
    copy = LocalCopy()
    copy.path.mkdir()
    try:
        fs.get_file(manifest_path, str(copy.path / layout.MANIFEST))
        manifest = json.loads((copy.path / layout.MANIFEST).read_text())
        for entry in manifest.get("files", []):
            name = str(entry["name"])
            if "/" in name or "\\" in name or name in ("", ".", ".."):
                raise CorruptArchiveError(f"The manifest of {url} names a file outside the archive: {name!r}.")
            local = copy.path / name
            fs.get_file(f"{root}/{name}", str(local))
            if "bytes" in entry and local.stat().st_size != int(entry["bytes"]):
                raise CorruptArchiveError(
                    f"{url}/{name} has {local.stat().st_size} bytes, but the manifest lists "
                    f"{entry['bytes']}; the archive changed while it was read, or is damaged."
                )
    except BaseException:
        copy.cleanup()
        raise
    return copy
