"""Archives on object storage: any fsspec URL (``s3://bucket/prefix``, ``gs://...``, ...).

The rest of the code works on local directories; this module is the one place that moves an
archive between a local directory and a store, through fsspec file systems:

* ``RemoteTarget`` (compress): checks the target before any work, and ``publish`` uploads a
  finished local archive, every data file first and ``manifest.json`` last.
* ``fetch`` (open, rebuild, SQL): downloads an archive to a private local directory,
  ``manifest.json`` first, then exactly the files it lists, and removes that copy when the
  object holding it is garbage-collected (or at exit).

What a store guarantees here (no atomic rename on object storage): the manifest is the only
pointer to an archive. A reader that finds no manifest finds no archive; a compress that
fails before its last upload leaves data files without a manifest, which nothing reads (and
which compress refuses to write over: remove the prefix, or choose another). An existing
archive is never replaced on a store (``overwrite=True`` is refused there): without an
atomic rename, replacing it would expose a mix of old and new files. A fetched file whose
size differs from the manifest's entry is refused (and with ``checksums=True`` the reader
checks every SHA-256), so a copy that raced another writer is detected, not read.

Credentials and endpoints: ``storage_options`` (fsspec options, e.g. ``{"key": ..., "secret":
..., "endpoint_url": ...}`` for s3fs), or the store's usual environment variables
(``AWS_ACCESS_KEY_ID``, ``AWS_SECRET_ACCESS_KEY``, ``AWS_ENDPOINT_URL`` for S3).
"""

from __future__ import annotations

import json
import shutil
import tempfile
import weakref
from pathlib import Path
from typing import Any

from ..errors import ArchiveExistsError, ArchiveNotFoundError, CorruptArchiveError, InvalidInputError
from . import layout

__all__ = ["is_url", "filesystem", "RemoteTarget", "fetch", "LocalCopy"]


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

    def publish(self, local: Path) -> str:
        """Upload the archive in ``local``: the files its manifest lists, then the manifest
        (the commit point). Returns the URL."""
        manifest = json.loads((local / layout.MANIFEST).read_text())
        for entry in manifest.get("files", []):
            name = entry["name"]
            self.fs.put_file(str(local / name), f"{self.root}/{name}")
        self.fs.put_file(str(local / layout.MANIFEST), f"{self.root}/{layout.MANIFEST}")
        return self.url


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
