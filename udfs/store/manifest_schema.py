"""The manifest's declared schema, and the checks that need only the manifest itself.

``MANIFEST_SCHEMA`` declares every field a reader uses: its JSON type, its range, and for
lists their items. ``validate(manifest, path)`` checks a parsed manifest against it, then the
rules that tie fields together (the numeric columns are the schema's numeric columns, the row
parts cover rows 0..m-1 without gap, every file the reader opens is listed with its SHA-256).
Any failure is one :class:`CorruptArchiveError` line naming the field, what it holds and what
was expected, so no malformed value reaches numpy or pyarrow as a raw TypeError, IndexError or
MemoryError.

File names must be plain names inside the archive directory: no separator, no ``..``, no
absolute path, no drive, no NUL (a crafted manifest must not read another archive's files).
That symlinks stay inside the directory is checked where the files are opened
(``integrity.check_listed_files``), since it needs the file system.

Older format versions are handled in one place only: :func:`older_format_rules`.
"""

from __future__ import annotations

import base64
import copy
import math
import re
import struct
from dataclasses import dataclass, field
from typing import Any

from ..errors import CorruptArchiveError
from . import layout

__all__ = ["MANIFEST_SCHEMA", "DIGEST_FIELD", "RENAMED_ERROR_KEYS", "MAX_ROWS", "MAX_COLUMNS", "validate",
           "check_plain_name", "older_format_rules", "older_row_file_rules", "DERIVED_KEYS", "derived_entries", "written_form", "sealed_by_groups", "ERROR_NOTES", "STORED_OPTION_VALUES",
           "COLUMN_TOLERANCES",
           "files_used", "OPTIONAL_TABLES", "holds_table"]

DIGEST_FIELD = "manifest_sha256"
# Row positions must be exact in float64 and in JSON readers of every language (2^53 - 1,
# common practice for JSON integers); widths beyond a million columns are not a table we write.
MAX_ROWS = 2**53 - 1
MAX_COLUMNS = 1_000_000
MAX_FILE_BYTES = 2**62
_HEX64 = re.compile(r"[0-9a-f]{64}")
_NAME_LIMIT = 255  # longest file name on common file systems (common practice)


# -- the declaration language: a few node types, each checks one JSON value --------------------
class _Bad(Exception):
    """A value that breaks the schema: ``where`` (a JSON path) and ``what`` was wrong."""

    def __init__(self, where: str, what: str):
        super().__init__(where, what)
        self.where, self.what = where, what


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


def _kind(value: Any) -> str:
    return {dict: "an object", list: "a list", str: "a string", bool: "a boolean",
            type(None): "null"}.get(type(value), "a number")


@dataclass(frozen=True)
class Int:
    low: int = 0
    high: int = MAX_ROWS

    def check(self, value: Any, where: str) -> None:
        if isinstance(value, bool) or not isinstance(value, int):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not an integer")
        if not self.low <= value <= self.high:
            raise _Bad(where, f"is {value}, outside {self.low}..{self.high}")


@dataclass(frozen=True)
class Num:
    positive: bool = False

    def check(self, value: Any, where: str) -> None:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not a number")
        if not math.isfinite(value):
            raise _Bad(where, f"is {value}, not a finite number")
        if self.positive and not value > 0:
            raise _Bad(where, f"is {value}, not a positive number")


@dataclass(frozen=True)
class Text:
    choices: tuple[str, ...] = ()
    pattern: str | None = None
    max_len: int = 10_000

    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, str):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not a string")
        if not value or len(value) > self.max_len:
            raise _Bad(where, f"has {len(value)} characters (1..{self.max_len} expected)")
        if self.choices and value not in self.choices:
            raise _Bad(where, f"is {_show(value)}, not one of {list(self.choices)}")
        if self.pattern and not re.fullmatch(self.pattern, value):
            raise _Bad(where, f"is {_show(value)}, not of the form {self.pattern}")


@dataclass(frozen=True)
class FileName:
    def check(self, value: Any, where: str) -> None:
        Text(max_len=_NAME_LIMIT).check(value, where)
        problem = check_plain_name(value)
        if problem:
            raise _Bad(where, f"is {_show(value)}: {problem}")


@dataclass(frozen=True)
class Digest:
    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, str) or not _HEX64.fullmatch(value):
            raise _Bad(where, f"is {_show(value)}, not a SHA-256 digest (64 lowercase hex digits)")


@dataclass(frozen=True)
class Nullable:
    inner: Any

    def check(self, value: Any, where: str) -> None:
        if value is not None:
            self.inner.check(value, where)


@dataclass(frozen=True)
class Flag:
    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, bool):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not true or false")


@dataclass(frozen=True)
class Anything:
    def check(self, value: Any, where: str) -> None:
        return None


@dataclass(frozen=True)
class Seq:
    item: Any
    min_len: int = 0
    max_len: int = MAX_COLUMNS
    length: int | None = None
    unique: bool = False

    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, list):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not a list")
        if self.length is not None and len(value) != self.length:
            raise _Bad(where, f"has {len(value)} entries where {self.length} are expected")
        if not self.min_len <= len(value) <= self.max_len:
            raise _Bad(where, f"has {len(value)} entries ({self.min_len}..{self.max_len} expected)")
        for i, item in enumerate(value):
            self.item.check(item, f"{where}[{i}]")
        if self.unique and len(set(map(str, value))) != len(value):
            raise _Bad(where, "lists an entry twice")


@dataclass(frozen=True)
class Record:
    required: dict[str, Any]
    optional: dict[str, Any] = field(default_factory=dict)

    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, dict):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not an object")
        for name, spec in self.required.items():
            if name not in value:
                raise _Bad(where, f"lacks the entry {name!r}")
            spec.check(value[name], f"{where}.{name}")
        for name, spec in self.optional.items():
            if name in value:
                spec.check(value[name], f"{where}.{name}")


@dataclass(frozen=True)
class Mapping:
    value: Any

    def check(self, value: Any, where: str) -> None:
        if not isinstance(value, dict):
            raise _Bad(where, f"is {_kind(value)} ({_show(value)}), not an object")
        for name, item in value.items():
            self.value.check(item, f"{where}.{name}")


# -- the manifest ---------------------------------------------------------------------------
_COLUMN = Text(max_len=10_000)
MANIFEST_SCHEMA = Record(
    required={
        "format": Text(choices=(layout.FORMAT_NAME,)),
        "format_version": Text(pattern=r"[0-9]{1,4}\.[0-9]{1,4}"),
        "writer": Record({"name": Text(max_len=200), "version": Text(max_len=200)}),
        "archive_id": Text(max_len=200),
        "shape": Seq(Int(), length=2),
        "schema": Seq(Record({"name": _COLUMN, "type": Text(max_len=2000),
                              "role": Text(choices=("numeric", "exact"))}), min_len=1),
        "numeric_columns": Seq(_COLUMN, min_len=1, unique=True),
        "method": Record({"kind": Text(max_len=100), "rank": Int(0, MAX_COLUMNS)}),
        "basis": Seq(Record({"name": _COLUMN, "fill": Num()},
                            {"stored_as": _COLUMN, "step": Num(positive=True)})),
        "anchors": Seq(Int(), max_len=MAX_ROWS, unique=True),
        "row_parts": Seq(Record({"name": FileName(), "first_row": Int(), "rows": Int(1, MAX_ROWS)}),
                         min_len=1, max_len=10_000_000),
        "files": Seq(Record({"name": FileName(), "bytes": Int(0, MAX_FILE_BYTES), "sha256": Digest()},
                            {"footer_sha256": Digest(),
                             # row files: per row group and per column (integrity.part_digests)
                             "group_sha256": Seq(Digest(), max_len=MAX_ROWS),
                             "column_sha256": Mapping(Digest())}),
                     min_len=1, max_len=10_000_000),
        "errors": Record({}),
        DIGEST_FIELD: Digest(),
    },
    optional={
        "exact_columns": Seq(_COLUMN, unique=True),
        "key": Nullable(_COLUMN),
        "tables": Nullable(Mapping(FileName())),
        "version": Int(0, MAX_ROWS),
        "spectrum": Nullable(Seq(Num())),
        "drift": Nullable(Record({})),
        "transform": Anything(),
        # False: the row files carry no row ledger (absent: they do, as every archive written
        # before it; model.FittedModel.row_ledger)
        "row_ledger": Flag(),
        # True: some NULL cells of columns with residual codes are stored as NULL codes in
        # the row files, not in cells.parquet (absent: none are). Readers serve both forms
        # alike (model.FittedModel.null_codes); the entry makes a reader that predates NULL
        # codes refuse the archive (an unknown entry) instead of misreading them.
        "null_codes": Flag(),
        # True: the row files hold every residual code of a row in one list column
        # (store/packed_codes.py, model.FittedModel.packed_codes); absent: one column per
        # coded column, as every archive written before it. A reader that predates it refuses
        # the archive (an unknown entry) instead of missing the codes.
        "packed_codes": Flag(),
    },
)


def check_plain_name(name: str) -> str | None:
    """Why ``name`` is not a plain file name inside the archive directory (None if it is)."""
    if name in (".", ".."):
        return "a file name cannot be '.' or '..'"
    if "/" in name or "\\" in name:
        return "a file name cannot hold a path separator"
    if "\x00" in name or ":" in name:
        return "a file name cannot hold NUL or ':'"
    if name == layout.MANIFEST:
        return "the manifest cannot list itself"
    return None


# Small tables an archive may go without: the anchors and cells tables are written only when
# they hold rows (an empty one cost 0.4 and 0.9 kB of a 50-column archive), and read as empty
# when absent; archives written before keep theirs, empty or not. The blocks table
# (``aggregate.BLOCKS``) is optional too: archives may go without aggregates.
OPTIONAL_TABLES = (layout.ANCHORS, layout.CELLS)


def holds_table(manifest: dict[str, Any], name: str) -> bool:
    """Whether this archive version has a file for the small table ``name``: the columns
    table always; an optional table when its file is listed in ``files`` (the manifest is
    sealed by its digest, so a table cannot be dropped without the digest noticing)."""
    if name == layout.COLUMNS:
        return True
    return layout.table_file(manifest, name) in {f["name"] for f in manifest["files"]}


def files_used(manifest: dict[str, Any]) -> list[str]:
    """Every file a reader opens for this manifest: the row parts, then the small tables
    (an optional table, :data:`OPTIONAL_TABLES` and the blocks table, only when listed, or
    when ``tables`` names it: a table named there must be listed)."""
    from .aggregate import BLOCKS  # noqa: PLC0415 - aggregate imports this module's users

    names = [p["name"] for p in manifest["row_parts"]] + [layout.table_file(manifest, layout.COLUMNS)]
    named = manifest.get("tables") or {}
    for table in (*OPTIONAL_TABLES, BLOCKS):
        if table in named or holds_table(manifest, table):
            names.append(layout.table_file(manifest, table))
    return names


def older_format_rules(manifest: dict[str, Any], path: Any) -> None:
    """The one place that knows older format versions (with :func:`older_row_file_rules`).

    Format 1.0 archives written before manifests carried their own digest
    (``manifest_sha256``) and the Parquet footer digests of their row files are refused:
    without them an edited manifest cannot be told from a true one. Refuse with what to do.

    Row files listed without row-group digests (``group_sha256`` and ``column_sha256``,
    written since the SQL scan checks by row group) are read as before: SQL checks their
    whole-file SHA-256 (:func:`sealed_by_groups` says which way a file is checked).

    The achieved error was once recorded under the name of the option that asks for a
    tolerance: ``errors.max_abs_error`` / ``errors.max_abs_error_over_std`` and
    ``achieved.max_abs_error`` are renamed here, in ``manifest`` (in place), to
    :data:`RENAMED_ERROR_KEYS`' new names. The caller computes the manifest's digest before
    this renaming (it seals the manifest as written).

    Archives written before the manifest's ``row_ledger`` entry carry the row ledger in
    every row file: an absent entry reads as true (``model.FittedModel.from_tables``), so
    their bounds keep using the row figures, and an append to them keeps writing them.

    Archives written before NULL residual codes (no ``null_codes`` entry) hold every NULL
    cell in cells.parquet; they read as they are (a reader serves a NULL code and a NULL
    exact cell the same way), and an append to them may add NULL codes (it then writes the
    entry).
    """
    if DIGEST_FIELD not in manifest:
        raise CorruptArchiveError(
            f"{path} has no {DIGEST_FIELD}: it was written by a rankfold before manifests "
            "carried their own digest, or the entry was removed. It cannot be checked for edits; "
            "compress the source again."
        )
    for section in ("errors", "achieved"):
        record = manifest.get(section)
        if not isinstance(record, dict):
            continue
        for old, new in RENAMED_ERROR_KEYS.items():
            if old in record and new not in record:
                record[new] = record.pop(old)


#: Entries a reader derives from others and a writer does not store (nothing stored twice):
#: ``numeric_columns`` is the schema's names with role "numeric", in schema order. Manifests
#: written before kept it; their copy is checked against the schema (``_cross_check``).
DERIVED_KEYS = ("numeric_columns",)
#: The value of a per-column ``targets.max_abs_error`` whose every value is the tolerance the
#: columns table holds for its column bit for bit (and that names exactly the columns that have
#: one): the tolerances are stored once, in columns.parquet (``FittedModel.tolerance``). Measured
#: on a real table of 6,830 columns: 150,512 bytes of decimal text in the manifest -> 32.
COLUMN_TOLERANCES = "as columns.parquet tolerance"
#: Target options recorded per column (``targets``); see :func:`written_form`.
_PER_COLUMN_TARGETS = ("rel_error", "max_abs_error", "max_std_error")


def _runs(values: list[Any]) -> list[list[Any]]:
    """Run-length form [[value, count], ...] of a list."""
    runs: list[list[Any]] = []
    for value in values:
        if runs and runs[-1][0] == value:
            runs[-1][1] += 1
        else:
            runs.append([value, 1])
    return runs


def _expanded(runs: Any, length: int) -> list[Any] | None:
    """The list of a run-length form, or None when it is not one of ``length`` entries."""
    if not isinstance(runs, list) or not all(isinstance(r, list) and len(r) == 2 and type(r[1]) is int
                                             and r[1] > 0 for r in runs):
        return None
    values = [r[0] for r in runs for _ in range(r[1])] if sum(r[1] for r in runs) == length else None
    return values


# -- numbered names: "data.1", "data.2", ... stored as one run --------------------------------
_NUMBERED = re.compile(r"(.*?)([0-9]{1,15})", re.DOTALL)
#: Shortest run of numbered names worth a run entry (a run costs about as much as two names).
_MIN_NUMBERED_RUN = 3


def _numbered(name: Any) -> tuple[str, int, int] | None:
    """(prefix, number, width) of a name that ends in decimal digits and is given back exactly
    by ``prefix + format(number, f"0{width}d")`` (width 0: no padding), else None."""
    match = _NUMBERED.fullmatch(name) if isinstance(name, str) else None
    if match is None:
        return None
    prefix, digits = match.groups()
    width = len(digits) if digits.startswith("0") and len(digits) > 1 else 0
    number = int(digits)
    return (prefix, number, width) if f"{prefix}{number:0{width}d}" == name else None


def _named_runs(names: list[Any]) -> list[Any]:
    """``names`` with every run of at least :data:`_MIN_NUMBERED_RUN` consecutive numbered
    names (same prefix and width, numbers rising by one) replaced by ``[prefix, first, count,
    width]``; other names stay strings (a list item is a run, a string a name). Measured on a
    real table of 6,830 columns named ``data.1`` .. ``data.6830``: 87,753 bytes of names -> 22."""
    stored: list[Any] = []
    i = 0
    while i < len(names):
        j = i + 1
        parsed = _numbered(names[i])
        if parsed is not None:  # the width is a least width: c08, c09, c10 is one run
            prefix, first, width = parsed
            while j < len(names) and names[j] == f"{prefix}{first + (j - i):0{width}d}":
                j += 1
        if j - i >= _MIN_NUMBERED_RUN:
            stored.append([prefix, first, j - i, width])
        else:
            stored.extend(names[i:j])
        i = j
    return stored


def _named_expanded(stored: Any) -> list[Any] | None:
    """The names of :func:`_named_runs`' form, or None when ``stored`` is not one (the caller
    leaves the entry for :func:`validate` to refuse)."""
    if not isinstance(stored, list):
        return None
    names: list[Any] = []
    for item in stored:
        if not isinstance(item, list):
            names.append(item)
            continue
        if (len(item) != 4 or not isinstance(item[0], str) or not all(type(v) is int for v in item[1:])
                or item[1] < 0 or not 1 <= item[2] <= MAX_COLUMNS - len(names) or not 0 <= item[3] <= 15):
            return None
        prefix, first, count, width = item
        names.extend(f"{prefix}{k:0{width}d}" for k in range(first, first + count))
    return names


# -- digests: hex in memory, base64url (43 characters) as stored --------------------------------
_B64_DIGEST = re.compile(r"[A-Za-z0-9_-]{43}")


def _short_digest(value: Any) -> Any:
    """A SHA-256 as 64 hex digits -> the same 32 bytes as 43 characters of unpadded base64url
    (RFC 4648, section 5); anything else as it is."""
    if isinstance(value, str) and _HEX64.fullmatch(value):
        return base64.urlsafe_b64encode(bytes.fromhex(value)).decode("ascii").rstrip("=")
    return value


def _hex_digest(value: Any) -> Any:
    """The inverse of :func:`_short_digest` (a 64-hex digest, as older manifests store it, and
    anything else stay as they are, for :func:`validate` to judge)."""
    if isinstance(value, str) and _B64_DIGEST.fullmatch(value):
        raw = base64.urlsafe_b64decode(value + "=")
        if _short_digest(raw.hex()) == value:  # the one canonical spelling only
            return raw.hex()
    return value


_FILE_DIGESTS = ("sha256", "footer_sha256")


def _map_file_digests(files: Any, convert) -> Any:
    """``files`` with every digest of each entry passed through ``convert`` (a new list)."""
    if not isinstance(files, list):
        return files
    out = []
    for entry in files:
        if isinstance(entry, dict):
            entry = dict(entry)
            for key in _FILE_DIGESTS:
                if key in entry:
                    entry[key] = convert(entry[key])
            if isinstance(entry.get("group_sha256"), list):
                entry["group_sha256"] = [convert(v) for v in entry["group_sha256"]]
            if isinstance(entry.get("column_sha256"), dict):
                entry["column_sha256"] = {k: convert(v) for k, v in entry["column_sha256"].items()}
        out.append(entry)
    return out


# -- float64 lists: little-endian bytes in base64 -----------------------------------------------
_FLOAT64 = "float64_le_base64"


def _packed_floats(values: list[Any]) -> str | None:
    """Finite float64 values as the base64 (RFC 4648) of their little-endian bytes: exact, 10.7
    characters a value against about 19 as shortest decimal text (None: not such a list)."""
    if not all(type(v) is float and math.isfinite(v) for v in values):
        return None
    return base64.b64encode(struct.pack(f"<{len(values)}d", *values)).decode("ascii")


def _unpacked_floats(text: Any) -> list[float] | None:
    """The inverse of :func:`_packed_floats`; None when ``text`` is not such a form."""
    if not isinstance(text, str) or len(text) > 12 * MAX_COLUMNS:
        return None
    try:
        raw = base64.b64decode(text, validate=True)
    except ValueError:
        return None
    if len(raw) % 8:
        return None
    return list(struct.unpack(f"<{len(raw) // 8}d", raw))


#: Texts written by every compress (``passes.compress``) or append, stored as their index here
#: (frozen: part of the stored form; a text not listed is stored as it is).
ERROR_NOTES = (
    "relative figures are in transformed units (after the transform); relative RMS is per column, "
    "divided by the column's standard deviation",
    "relative figures are in transformed units (after the transform); relative RMS is per column, "
    "divided by the column's standard deviation; the spectrum, and so the optimal error, is estimated "
    "from the sketch's sample of rows; every error, and the table's norm, is measured on every row",
    "after appends: relative_frobenius, the column figures and the cell counts cover every row; the "
    "optimum and spectrum are those of the compressed rows",
)
_NOTE_KEYS = ("note", "note_append")
#: Figures of ``achieved`` that repeat the ``errors`` record (left out where equal).
_ACHIEVED_REPEATS = ("relative_frobenius", "largest_error")
#: The compress options as recorded in ``method.options`` when left at these values (frozen:
#: part of the stored form, not the code's current defaults): an option recorded with the
#: value listed here is left out of the stored form and filled back on read.
STORED_OPTION_VALUES = {
    "rank": None, "seed": 0, "method": None, "column_method": "pivoted_qr", "row_method": "qdeim",
    "link": "cx", "transform": "standardize", "n_columns": None, "n_rows": None, "replace": None,
    "key": None, "exact_columns": [], "batch_rows": 131072, "sketch_rows": "auto", "residual": "auto",
    "basis_precision": "auto", "row_differences": "off", "refit_outliers": None,
}
#: The entry of a stored ``method.options`` that says every option of
#: :data:`STORED_OPTION_VALUES` it does not name has the value listed there.
_OTHERS = "others_as_stored_values"


def written_form(manifest: dict[str, Any]) -> dict[str, Any]:
    """The manifest as a writer stores it (a new dict; ``manifest`` is left alone), the inverse of
    :func:`derived_entries`. Nothing is stored twice, and what repeats is stored once:

    * :data:`DERIVED_KEYS` are left out;
    * ``schema`` is stored by field, ``{"names": [...], "types": runs, "roles": runs}`` with
      types and roles as runs ``[[value, count], ...]`` (a 751-column schema: 49 kB as one
      record per column, 16 kB so), and runs of numbered names as ``[prefix, first, count,
      width]`` (:func:`_named_runs`);
    * a per-column target of ``targets`` that names every numeric column in schema order is
      stored as a list of its values (the names are the schema's);
    * ``spectrum`` is stored as ``{"float64_le_base64": text, "zeros": k}``: its values up to
      the zeros that end it (beyond the table's rank: a 64-row table of 6,830 columns has
      6,766) as little-endian float64 bytes in base64 (:func:`_packed_floats`, exact), and the
      count of those zeros;
    * every SHA-256 of ``files`` as 43 characters of base64url instead of 64 hex digits;
    * ``basis`` by field (:func:`_basis_by_field`: the keys once, names as runs);
    * the ``errors`` notes rankfold writes as their index in :data:`ERROR_NOTES`; ``achieved``
      without the figures equal to those of ``errors`` (:data:`_ACHIEVED_REPEATS`);
      ``method.options`` without the options recorded at their :data:`STORED_OPTION_VALUES`
      (the entry ``others_as_stored_values: true`` says so).

    Measured (DEVELOPERS.md, "Sizes"): manifest.json 4,999 -> 3,521 bytes on benchmarks/overhead.py
    (2,000 x 50); 228,413 -> 2,751 on a real table of 6,830 columns with a tolerance per column
    (the tolerances: ``COLUMN_TOLERANCES``)."""
    body = {k: v for k, v in manifest.items() if k not in DERIVED_KEYS}
    spectrum = body.get("spectrum")
    if isinstance(spectrum, list):
        kept = len(spectrum)
        while kept and type(spectrum[kept - 1]) is float and spectrum[kept - 1] == 0 and math.copysign(1.0, spectrum[kept - 1]) > 0:
            kept -= 1
        packed = _packed_floats(spectrum[:kept])
        if packed is not None:
            body["spectrum"] = {_FLOAT64: packed, "zeros": len(spectrum) - kept}
    if "files" in body:
        body["files"] = _map_file_digests(body["files"], _short_digest)
    if "basis" in body:
        body["basis"] = _basis_by_field(body["basis"])
    errors = body.get("errors")
    if isinstance(errors, dict):
        body["errors"] = {k: (ERROR_NOTES.index(v) if k in _NOTE_KEYS and v in ERROR_NOTES else v)
                          for k, v in errors.items()}
    achieved, errors = body.get("achieved"), manifest.get("errors")
    if isinstance(achieved, dict) and isinstance(errors, dict):
        body["achieved"] = {k: v for k, v in achieved.items()
                            if not (k in _ACHIEVED_REPEATS and k in errors and _same_json(v, errors[k]))}
    method = body.get("method")
    if isinstance(method, dict) and isinstance(method.get("options"), dict) and _OTHERS not in method["options"]:
        options = method["options"]
        kept = {k: v for k, v in options.items()
                if not (k in STORED_OPTION_VALUES and _same_json(v, STORED_OPTION_VALUES[k]))}
        body["method"] = {**method, "options": {_OTHERS: True, **kept}}
    schema = body.get("schema")
    if isinstance(schema, list) and all(isinstance(f, dict) and set(f) == {"name", "type", "role"} for f in schema):
        body["schema"] = {"names": _named_runs([f["name"] for f in schema]),
                          "types": _runs([f["type"] for f in schema]),
                          "roles": _runs([f["role"] for f in schema])}
        numeric = [f["name"] for f in schema if f["role"] == "numeric"]
        targets = body.get("targets")
        if isinstance(targets, dict):
            targets = dict(targets)
            for key in _PER_COLUMN_TARGETS:
                value = targets.get(key)
                if isinstance(value, dict) and list(value) == numeric:
                    targets[key] = list(value.values())
            body["targets"] = targets
    return body


_BASIS_KEYS = ("name", "fill", "step", "stored_as")  # "name" and "fill" in every entry


def _basis_by_field(basis: Any) -> Any:
    """The ``basis`` list stored by field, ``{"name": names, "fill": [...], "step": [...],
    "stored_as": names}``: an entry without ``step`` or ``stored_as`` has null there (a field
    null in every entry is left out), names in the form of :func:`_named_runs`. Anything else
    is returned as it is."""
    if not (isinstance(basis, list) and basis and all(
            isinstance(b, dict) and {"name", "fill"} <= set(b) <= set(_BASIS_KEYS)
            and all(v is not None for v in b.values()) for b in basis)):
        return basis
    stored: dict[str, Any] = {}
    for key in _BASIS_KEYS:
        values = [b.get(key) for b in basis]
        if all(v is None for v in values):
            continue
        stored[key] = _named_runs(values) if key in ("name", "stored_as") and None not in values else values
    return stored


def _basis_entries(stored: Any) -> Any:
    """The inverse of :func:`_basis_by_field` (a form that does not fit is returned as it is,
    for :func:`validate` to refuse)."""
    if not (isinstance(stored, dict) and {"name", "fill"} <= set(stored) <= set(_BASIS_KEYS)):
        return stored
    fields = {k: (_named_expanded(v) if k in ("name", "stored_as") else v) for k, v in stored.items()}
    if any(not isinstance(v, list) for v in fields.values()) or len({len(v) for v in fields.values()}) != 1:
        return stored
    count = len(fields["name"])
    return [{k: fields[k][i] for k in _BASIS_KEYS if k in fields and fields[k][i] is not None}
            for i in range(count)]


def _same_json(a: Any, b: Any) -> bool:
    """Equal as JSON values (1 and 1.0 and True differ: the stored form must give back the
    same text)."""
    return type(a) is type(b) and a == b


def derived_entries(manifest: dict[str, Any]) -> None:
    """Undo :func:`written_form` on a manifest as read (in place): the schema by field back to
    one record per column (numbered runs expanded), per-column targets stored as lists back to
    mappings, the spectrum's bytes and count of final zeros back to a list, digests back to hex,
    notes, the repeated figures of ``achieved`` and the omitted options back, and
    :data:`DERIVED_KEYS` added (an older manifest's own copy is kept, and then checked by
    :func:`validate`). A form that does not fit together is left as it is, for :func:`validate`
    to refuse with its place named. Manifests written before any of these forms are read as
    they are."""
    spectrum = manifest.get("spectrum")
    if (isinstance(spectrum, dict) and len(spectrum) == 2 and "zeros" in spectrum
            and type(spectrum["zeros"]) is int and 0 <= spectrum["zeros"] <= MAX_COLUMNS):
        values = (_unpacked_floats(spectrum[_FLOAT64]) if _FLOAT64 in spectrum
                  else spectrum.get("values") if isinstance(spectrum.get("values"), list) else None)
        if values is not None:
            manifest["spectrum"] = values + [0.0] * spectrum["zeros"]
    if "files" in manifest:
        manifest["files"] = _map_file_digests(manifest["files"], _hex_digest)
    if "basis" in manifest:
        manifest["basis"] = _basis_entries(manifest["basis"])
    errors = manifest.get("errors")
    if isinstance(errors, dict):
        for key in _NOTE_KEYS:
            if type(errors.get(key)) is int and 0 <= errors[key] < len(ERROR_NOTES):
                errors[key] = ERROR_NOTES[errors[key]]
        achieved = manifest.get("achieved")
        if isinstance(achieved, dict):
            for key in _ACHIEVED_REPEATS:
                if key not in achieved and key in errors:
                    achieved[key] = errors[key]
    method = manifest.get("method")
    options = method.get("options") if isinstance(method, dict) else None
    if isinstance(options, dict) and options.get(_OTHERS) is True:
        del options[_OTHERS]
        for key, value in STORED_OPTION_VALUES.items():
            options.setdefault(key, copy.deepcopy(value))
    schema = manifest.get("schema")
    if isinstance(schema, dict) and set(schema) == {"names", "types", "roles"}:
        names = _named_expanded(schema["names"])
        if names is not None:
            types, roles = _expanded(schema["types"], len(names)), _expanded(schema["roles"], len(names))
            if types is not None and roles is not None:
                manifest["schema"] = schema = [{"name": n, "type": t, "role": r}
                                               for n, t, r in zip(names, types, roles)]
    if not isinstance(schema, list) or not all(isinstance(f, dict) for f in schema):
        return
    numeric = [f.get("name") for f in schema if f.get("role") == "numeric"]
    targets = manifest.get("targets")
    if isinstance(targets, dict):
        for key in _PER_COLUMN_TARGETS:
            value = targets.get(key)
            if isinstance(value, list) and len(value) == len(numeric):
                targets[key] = dict(zip(numeric, value))
    manifest.setdefault("numeric_columns", numeric)


# older name -> name, in the manifest's ``errors`` and ``achieved`` records: the achieved error
# has a name of its own (``max_abs_error`` is the option that asks for a tolerance)
RENAMED_ERROR_KEYS = {"max_abs_error": "largest_error", "max_abs_error_over_std": "largest_error_over_std"}


def older_row_file_rules(field_types: dict[str, Any], path: Any) -> None:
    """The row-file side of :func:`older_format_rules` (``field_types``: a row file's column
    names and Arrow types). Residual codes stored as signed integers come from development
    builds before format 1.0 was settled (codes are zigzag unsigned since): refuse them with
    what to do."""
    signed = [name for name, kind in field_types.items()
              if name.startswith(layout.CODE_PATTERN.format("")) and not str(kind).startswith("uint")]
    if signed:
        raise CorruptArchiveError(
            f"{path} stores residual codes as signed integers ({signed[0]}), as development "
            "builds before format 1.0 was settled did; compress the source again."
        )


def sealed_by_groups(entry: dict[str, Any]) -> bool:
    """Whether the row file of this ``files`` entry carries row-group digests, so SQL may
    check it by row group; without them (older archives, see :func:`older_format_rules`)
    SQL checks the whole file."""
    return "group_sha256" in entry and "column_sha256" in entry


def validate(manifest: dict[str, Any], path: Any) -> None:
    """Check ``manifest`` (parsed JSON) against :data:`MANIFEST_SCHEMA` and the rules tying
    its fields together; raise :class:`CorruptArchiveError` (one line) on the first problem."""
    try:
        MANIFEST_SCHEMA.check(manifest, "manifest")
        _cross_check(manifest)
    except _Bad as bad:
        raise CorruptArchiveError(
            f"{path}: {bad.where} {bad.what}; the archive is damaged or was edited: restore "
            "it from a copy or compress the source again."
        ) from None


def _cross_check(m: dict[str, Any]) -> None:
    rows, width = m["shape"]
    if rows < 1:
        raise _Bad("manifest.shape[0]", f"is {rows}; an archive holds at least one row")
    if not 1 <= width <= MAX_COLUMNS:
        raise _Bad("manifest.shape[1]", f"is {width}, outside 1..{MAX_COLUMNS}")
    names = [f["name"] for f in m["schema"]]
    if len(set(names)) != len(names):
        raise _Bad("manifest.schema", "names a column twice")
    numeric = [f["name"] for f in m["schema"] if f["role"] == "numeric"]
    if m["numeric_columns"] != numeric:
        raise _Bad("manifest.numeric_columns", "differs from the schema's numeric columns")
    if len(numeric) != width:
        raise _Bad("manifest.shape[1]", f"is {width} where the schema has {len(numeric)} numeric columns")
    exact = {f["name"] for f in m["schema"] if f["role"] == "exact"}
    if "exact_columns" in m and set(m["exact_columns"]) != exact:
        raise _Bad("manifest.exact_columns", "differs from the schema's exact columns")
    if m.get("key") is not None and m["key"] not in exact:
        raise _Bad("manifest.key", f"is {_show(m['key'])}, not one of the exact columns")
    basis = [b["name"] for b in m["basis"]]
    scores = {n for n in basis if n.startswith(layout.RESERVED_PREFIX)}  # SVD scores
    if len(set(basis)) != len(basis) or not set(basis) - scores <= set(numeric):
        raise _Bad("manifest.basis", "names a column twice or one that is not numeric")
    stored = [b.get("stored_as", b["name"]) for b in m["basis"]]
    if len(set(stored)) != len(stored) or set(stored) & exact:
        raise _Bad("manifest.basis", "stores two entries, or an exact column, in one row-file column")
    if any(a >= rows for a in m["anchors"]):
        raise _Bad("manifest.anchors", f"holds a row position beyond the {rows} rows")
    if m["anchors"] and not holds_table(m, layout.ANCHORS):
        raise _Bad("manifest.files", f"lists no anchors table for the {len(m['anchors'])} anchor rows")
    expected = 0
    for k, part in enumerate(m["row_parts"]):
        if part["first_row"] != expected:
            raise _Bad(f"manifest.row_parts[{k}].first_row",
                       f"is {part['first_row']} where {expected} follows the previous parts")
        expected += part["rows"]
    if expected != rows:
        raise _Bad("manifest.row_parts", f"hold {expected} rows where the shape says {rows}")
    listed = [f["name"] for f in m["files"]]
    if len(set(listed)) != len(listed):
        raise _Bad("manifest.files", "lists a file twice")
    for name in files_used(m):
        if check_plain_name(name):
            raise _Bad("manifest.tables", f"names {_show(name)}: {check_plain_name(name)}")
        if name not in listed:
            raise _Bad("manifest.files", f"does not list {name}, which the archive uses")
    by_name = {f["name"]: f for f in m["files"]}
    for part in m["row_parts"]:
        if "footer_sha256" not in by_name[part["name"]]:
            raise _Bad("manifest.files", f"gives no footer_sha256 for the row file {part['name']}")
