"""The archive manifest: a JSON document that makes the archive self-describing.

It records the format name and version, the writer (name and version), creation time, the
source schema (names, Arrow types and roles, in source order), the shape, the method with its
options and seed, the basis and anchor rows, every file with its size and SHA-256, and an
error summary, and ``manifest_sha256``: the SHA-256 of the manifest's own canonical JSON
without that entry (:func:`manifest_digest`), written first so that a reader finds it in the
file's first bytes. Readers refuse an unknown major version and name both versions, then check
the digest, then the declared schema (``manifest_schema``).
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any

from ..errors import CorruptArchiveError, SizeTargetMissedError, UnsupportedVersionError
from . import layout
from .integrity import check_listed_files, footer_sha256, part_digests, sha256_of
from .manifest_schema import DIGEST_FIELD, derived_entries, older_format_rules, validate, written_form

__all__ = ["sha256_of", "file_entry", "entry_of", "write_manifest", "sealed_manifest_text",
           "read_manifest", "check_files",
           "manifest_digest", "DIGEST_FIELD"]

REQUIRED_KEYS = ("format", "format_version", "writer", "archive_id", "shape", "schema",
                 "method", "basis", "anchors", "files", "errors")


#: Stems of the small tables' file names (``columns.parquet``, ``columns.<token>.parquet``, ...):
#: every reader hashes them whole (``integrity.read_small_table``), so their footers get no
#: digest of their own (62 bytes of manifest each).
_HASHED_WHOLE = tuple(n.split(".")[0] for n in (layout.COLUMNS, layout.ANCHORS, layout.CELLS, "blocks.parquet"))


def file_entry(directory: Path, name: str, keyed: list[str] | None = None) -> dict[str, Any]:
    """The manifest's record of one file: name, size, SHA-256, and for Parquet files other
    than the small tables (:data:`_HASHED_WHOLE`) the SHA-256 of the footer (checked on every
    open, where hashing a whole row file is not); for row files also the SHA-256 of each row
    group and of the chunks of the columns ``keyed`` (``_rf_row`` and the exact columns:
    ``integrity.part_digests``; SQL checks only what a query reads)."""
    path = directory / name
    footer = name.endswith(".parquet") and name.split(".")[0] not in _HASHED_WHOLE
    entry = entry_of(name, path.stat().st_size, sha256_of(path), footer_sha256(path) if footer else None)
    if name.startswith(layout.ROWS_PATTERN.split("{")[0]) and name.endswith(".parquet"):
        entry.update(part_digests(path, keyed))
    return entry


def entry_of(name: str, size: int, sha256: str, footer: str | None = None) -> dict[str, Any]:
    """The manifest's record of one file from figures measured elsewhere (a file streamed to
    object storage, hashed as it was written: ``remote.StagedUpload``); ``footer`` is the
    SHA-256 of a Parquet file's footer (``integrity.footer_sha256``), None for other files.
    Such a row file has no per-row-group digests: SQL checks it whole (``older_format_rules``)."""
    entry = {"name": name, "bytes": int(size), "sha256": sha256}
    if footer is not None:
        entry["footer_sha256"] = footer
    return entry


def manifest_digest(manifest: dict[str, Any]) -> str:
    """SHA-256 of the canonical JSON of ``manifest`` without its ``manifest_sha256`` entry
    (keys sorted, no spaces, ASCII only: the same bytes whatever the writer's layout)."""
    body = {k: v for k, v in manifest.items() if k != DIGEST_FIELD}
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def manifest_text(manifest: dict[str, Any]) -> str:
    """The manifest as written: one line per top-level field, each value as compact JSON.
    Still readable line by line and diffable, and smaller than indented JSON (measured
    11.8 kB -> 9.3 kB for the 64 columns of scikit-learn's digits; every byte counts).
    The manifest is written in its stored form (``manifest_schema.written_form``: nothing a
    reader derives, the schema by field)."""
    lines = [f"{json.dumps(k)}: {json.dumps(v, separators=(',', ':'), allow_nan=False)}"
             for k, v in written_form(manifest).items()]
    return "{\n" + ",\n".join(lines) + "\n}\n"


def _listed_bytes(manifest: dict[str, Any]) -> int:
    """The total ``bytes`` of the manifest's ``files`` entries. A malformed entry counts 0:
    writers list well-formed entries only, and tests that seal a damaged manifest on purpose
    rely on the reader's schema check (``manifest_schema.validate``) to refuse it."""
    files = manifest.get("files")
    return sum(f["bytes"] for f in files if isinstance(f, dict) and type(f.get("bytes")) is int
               ) if isinstance(files, list) else 0


def sealed_manifest_text(manifest: dict[str, Any]) -> str:
    """The text of ``manifest.json`` for ``manifest``, sealed with its digest.

    When the manifest records ``achieved.bytes``, that figure is made the size of the whole
    archive: every listed file plus this text itself. The text holds its own size, so the
    figure is found as a fixed point: start from the data files' total, write the text, add
    its length, repeat until the figure no longer changes. The text grows only when the
    figure gains a digit, so the figures rise monotonically and settle within a few rounds
    (two in practice). Chosen over "data files here, readers add the manifest" so that the
    manifest alone tells the truth to anyone who reads it (``rankfold inspect --json``, a
    script), whatever reads it. ``manifest["achieved"]`` is replaced by a new dict holding the
    figure (a dict shared with an older manifest, as an append copies it, is left alone)."""
    body = {k: v for k, v in written_form(manifest).items() if k != DIGEST_FIELD}
    if not isinstance(body.get("achieved"), dict) or "bytes" not in body["achieved"]:
        return manifest_text({DIGEST_FIELD: manifest_digest(body), **body})
    achieved = body["achieved"] = dict(body["achieved"])
    recorded = manifest["achieved"] = dict(manifest["achieved"])
    data = _listed_bytes(body)
    total = data
    for _ in range(64):  # each round adds at least one digit to the figure or ends the loop
        achieved["bytes"] = recorded["bytes"] = total
        text = manifest_text({DIGEST_FIELD: manifest_digest(body), **body})
        if data + len(text.encode("utf-8")) == total:
            return text
        total = data + len(text.encode("utf-8"))
    raise AssertionError("the manifest's size did not settle")  # pragma: no cover - see above


def write_manifest(directory: Path, manifest: dict[str, Any], *, at_most: int | None = None) -> None:
    """Write ``manifest.json`` durably (write, flush, fsync) and atomically: into a temporary
    file that then replaces the manifest in one rename, so a reader sees the old or the new
    version, never a mix (an append commits a new archive version this way).

    ``achieved.bytes``, when the manifest records it, becomes the whole archive's size, this
    manifest included (:func:`sealed_manifest_text`). With ``at_most`` (a size target in
    bytes), an archive whose whole size exceeds it is refused before anything is written:
    :class:`SizeTargetMissedError` carries the size."""
    path = directory / layout.MANIFEST
    temp = directory / f".{layout.MANIFEST}.{os.getpid()}.tmp"
    text = sealed_manifest_text(manifest)
    if at_most is not None:
        total = _listed_bytes(manifest) + len(text.encode("utf-8"))
        if total > at_most:
            raise SizeTargetMissedError(
                f"target_bytes={at_most} cannot be met: the archive as written takes {total} "
                f"bytes ({len(text.encode('utf-8'))} of them its manifest). Raise the target to "
                f"at least {total}, or ask for an error target instead.", total=total)
    try:
        with open(temp, "w", encoding="utf-8") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)
        raise


def read_manifest(directory: Path) -> dict[str, Any]:
    """Load and validate the manifest of the archive at ``directory``."""
    path = directory / layout.MANIFEST
    try:
        text = path.read_text(encoding="utf-8")
        manifest = json.loads(text)
    except FileNotFoundError:
        raise CorruptArchiveError(
            f"{directory} has no {layout.MANIFEST}: it is not a rankfold archive, or its "
            "writing was interrupted; compress the source again."
        ) from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise CorruptArchiveError(
            f"{path} is not valid JSON ({exc}); the archive is damaged: restore it from a copy "
            "or compress the source again."
        ) from None
    if not isinstance(manifest, dict) or manifest.get("format") != layout.FORMAT_NAME:
        raise CorruptArchiveError(
            f"{path} is not a rankfold manifest (format is {manifest.get('format')!r} "
            f"where {layout.FORMAT_NAME!r} was expected)."
            if isinstance(manifest, dict) else f"{path} is not a rankfold manifest."
        )
    version = str(manifest.get("format_version", ""))
    if version.split(".")[0] != layout.FORMAT_VERSION.split(".")[0]:
        writer = manifest.get("writer") if isinstance(manifest.get("writer"), dict) else {}
        raise UnsupportedVersionError(
            f"{directory} uses archive format {version or '?'} (written by "
            f"{writer.get('name', '?')} {writer.get('version', '?')}); this rankfold reads "
            f"format {layout.FORMAT_VERSION.split('.')[0]}.x. Open it with a matching rankfold version."
        )
    try:  # of the manifest as written: older_format_rules may rename entries
        digest = manifest_digest(manifest)
    except (ValueError, RecursionError):  # NaN or infinity (JSON extensions), or absurd nesting
        digest = None
    older_format_rules(manifest, path)
    derived_entries(manifest)
    if digest is None or manifest.get(DIGEST_FIELD) != digest:
        raise CorruptArchiveError(
            f"{path} does not match its own {DIGEST_FIELD}: the manifest was edited or damaged "
            "after it was written. Restore the archive from a copy or compress the source again."
        )
    missing = [key for key in REQUIRED_KEYS if key not in manifest]
    if missing:
        raise CorruptArchiveError(f"{path} lacks the entries {missing}; the archive is damaged.")
    validate(manifest, path)
    return manifest


def check_files(directory: Path, manifest: dict[str, Any], *, checksums: bool) -> None:
    """Check that every listed file is a regular file inside the archive with its recorded
    size and (Parquet) footer digest, and with its whole-file SHA-256 if asked."""
    check_listed_files(directory, manifest)
    for entry in manifest["files"] if checksums else ():
        path = directory / entry["name"]
        if sha256_of(path) != entry["sha256"]:
            raise CorruptArchiveError(
                f"{path} does not match its SHA-256 in the manifest; the archive is damaged "
                "or was edited."
            )
