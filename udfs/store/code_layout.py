"""Parquet encoding and zstd level of coded columns, chosen by trial with the real writer.

How well a column of offsets compresses depends on its values in ways no simple model
predicts (runs of equal values, slowly drifting offsets, a few outliers). So the layout is
chosen by measurement: a seeded sample of whole chunks of every column is written with the
real pyarrow Parquet writer into memory (``pa.BufferOutputStream``), once per candidate layout
(every encoding of :data:`ENCODINGS` at every level of :data:`ZSTD_LEVELS`), all columns in one
file per layout; the compressed size of each column chunk is read back from the file's own
metadata, and each column keeps the layout that made it smallest.

``PLAIN``, ``DELTA_BINARY_PACKED`` and ``BYTE_STREAM_SPLIT`` are the Parquet encodings pyarrow
writes for integer columns of every width (``BYTE_STREAM_SPLIT`` for integers since Parquet
format 2.11); ``dictionary`` is pyarrow's dictionary encoding (falling back to plain when the
dictionary grows too large). References: Apache Parquet format specification, "Encodings";
zstd: Y. Collet, M. Kucherawy, RFC 8878 (2021).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import InvalidInputError
from . import layout, packed_codes
from .chunk_codes import DIFFERENCE_PREDICTORS, CodedColumn

__all__ = [
    "ENCODINGS",
    "ZSTD_LEVELS",
    "SAMPLE_CHUNKS",
    "ColumnLayout",
    "LayoutChoice",
    "sample_chunks",
    "sampled_offsets",
    "trial_sizes",
    "choose_layouts",
    "choose_sample_layouts",
    "writer_options",
    "chunk_overhead_bytes",
    "PackingChoice",
    "choose_packed_layout",
    "choose_packing",
    "PACKING_CELLS",
    "PACKING_GAIN",
]

ENCODINGS = ("PLAIN", "DELTA_BINARY_PACKED", "BYTE_STREAM_SPLIT", "dictionary")
#: zstd levels tried: 1 (fastest), 3 (zstd's default), 9 and 19 (slow to write, not to read).
ZSTD_LEVELS = (1, 3, 9, 19)
#: Whole chunks written per trial (all of them when a column has fewer).
SAMPLE_CHUNKS = 8


@dataclass(frozen=True)
class ColumnLayout:
    """How one column is written: a Parquet encoding of :data:`ENCODINGS` and a zstd level."""

    encoding: str
    zstd_level: int

    def __post_init__(self) -> None:
        if self.encoding not in ENCODINGS:
            raise InvalidInputError(f"Unknown Parquet encoding {self.encoding!r} for coded columns; "
                                    f"choose one of {', '.join(ENCODINGS)}.")
        if isinstance(self.zstd_level, bool) or not isinstance(self.zstd_level, (int, np.integer)) \
                or not 1 <= self.zstd_level <= 22:
            raise InvalidInputError(f"zstd level must be an integer from 1 to 22; got {self.zstd_level!r}.")


@dataclass(frozen=True)
class LayoutChoice:
    """The layout a trial chose for one column, with the bytes its sample took under it and
    under every layout tried (``sizes``: layout -> compressed bytes of the sample)."""

    layout: ColumnLayout
    sampled_bytes: int
    sampled_rows: int
    sizes: Mapping[ColumnLayout, int]


def sample_chunks(chunks: int, seed: int, count: int = SAMPLE_CHUNKS) -> np.ndarray:
    """``min(count, chunks)`` distinct chunk indices drawn without replacement by
    ``numpy.random.default_rng(seed)``, sorted (int64, shape ``(min(count, chunks),)``)."""
    if chunks < 0 or count < 1:
        raise InvalidInputError(f"sample_chunks needs chunks >= 0 and count >= 1; got {chunks} and {count}.")
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(chunks, size=min(count, chunks), replace=False)).astype(np.int64)


def sampled_offsets(coded: CodedColumn, picked: np.ndarray) -> pa.Array:
    """The offsets of the chunks ``picked`` (in order), NULL where not valid."""
    k = coded.chunk_rows
    rows = np.concatenate([np.arange(c * k, min((c + 1) * k, coded.rows)) for c in picked]) \
        if len(picked) else np.zeros(0, dtype=np.int64)
    return pa.array(coded.offsets[rows], mask=~coded.valid[rows])


def _column_bytes(table: pa.Table, **writer: object) -> dict[str, int]:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, **writer)
    meta = pq.ParquetFile(pa.BufferReader(sink.getvalue())).metadata
    sizes = dict.fromkeys(table.column_names, 0)
    for g in range(meta.num_row_groups):
        group = meta.row_group(g)
        for j, name in enumerate(table.column_names):
            sizes[name] += group.column(j).total_compressed_size
    return sizes


def trial_sizes(columns: Mapping[str, pa.Array], layouts: Mapping[str, ColumnLayout]
                | Sequence[ColumnLayout]) -> dict[str, dict[ColumnLayout, int]]:
    """Compressed bytes (data and dictionary pages with their headers, as the file's metadata
    records them) of each column under each layout. ``layouts`` is either a sequence of
    layouts, each tried on every column (one in-memory Parquet file per layout), or a mapping
    column -> layout, tried in one file."""
    table = pa.table(dict(columns))
    out: dict[str, dict[ColumnLayout, int]] = {name: {} for name in table.column_names}
    plans = [dict.fromkeys(table.column_names, lay) for lay in layouts] if not isinstance(layouts, Mapping) \
        else [dict(layouts)]
    for plan in plans:
        for name, size in _column_bytes(table, **writer_options(plan)).items():
            out[name][plan[name]] = size
    return out


def choose_layouts(columns: Mapping[str, CodedColumn], *, seed: int, sample: int = SAMPLE_CHUNKS,
                   encodings: Sequence[str] = ENCODINGS, levels: Sequence[int] = ZSTD_LEVELS
                   ) -> dict[str, LayoutChoice]:
    """For each coded column, the layout under which a seeded sample of its chunks is smallest.

    All columns must share rows and chunk size: the same chunks are sampled for every column,
    so columns (and the candidate predictors of one column, given as separate entries) are
    compared on the same rows. The search has two stages, each a few in-memory files holding
    every column: every encoding at zstd level 3 (the level changes the sizes of the encodings
    much less than the encoding does), then each column's best encoding at every other level
    of ``levels``; ``len(encodings) + len(levels) - 1`` files in all, instead of the
    ``len(encodings) * len(levels)`` of the full grid. Ties go to the earlier encoding, then
    the earlier level.
    """
    if not columns:
        raise InvalidInputError("choose_layouts needs at least one coded column.")
    shapes = {(c.rows, c.chunk_rows) for c in columns.values()}
    if len(shapes) != 1:
        raise InvalidInputError(f"choose_layouts: the columns differ in rows or chunk size ({sorted(shapes)}); "
                                "compare columns of one table, coded with one chunk size.")
    first = next(iter(columns.values()))
    picked = sample_chunks(first.chunks, seed, sample)
    return choose_sample_layouts({name: sampled_offsets(c, picked) for name, c in columns.items()},
                                 encodings=encodings, levels=levels)


def choose_sample_layouts(arrays: Mapping[str, pa.Array], *, encodings: Sequence[str] = ENCODINGS,
                          levels: Sequence[int] = ZSTD_LEVELS) -> dict[str, LayoutChoice]:
    """For each sampled integer column of ``arrays`` (all of one length: the same rows of one
    table), the layout under which it is smallest: the two-stage search of
    :func:`choose_layouts` on samples the caller drew."""
    if not arrays:
        raise InvalidInputError("choose_sample_layouts needs at least one sampled column.")
    base_level = 3 if 3 in levels else int(levels[0])
    sizes = trial_sizes(arrays, [ColumnLayout(e, base_level) for e in encodings])
    best_encoding = {name: min(by.items(), key=lambda item: item[1])[0].encoding for name, by in sizes.items()}
    for level in levels:
        if level != base_level:
            plan = {name: ColumnLayout(best_encoding[name], int(level)) for name in arrays}
            for name, by in trial_sizes(arrays, plan).items():
                sizes[name].update(by)
    rows = len(arrays[next(iter(arrays))])
    order = {ColumnLayout(e, int(level)): i for i, (e, level) in
             enumerate((e, level) for e in encodings for level in levels)}
    out = {}
    for name, by_layout in sizes.items():
        best = min(by_layout, key=lambda lay: (by_layout[lay], order[lay]))
        out[name] = LayoutChoice(best, by_layout[best], rows, by_layout)
    return out


def writer_options(layouts: Mapping[str, ColumnLayout]) -> dict:
    """Keyword arguments for ``pyarrow.parquet.write_table`` / ``ParquetWriter`` that write each
    column with its layout (zstd at the column's level)."""
    dictionary = [n for n, lay in layouts.items() if lay.encoding == "dictionary"]
    encoding = {n: lay.encoding for n, lay in layouts.items() if lay.encoding != "dictionary"}
    return dict(compression="zstd", use_dictionary=dictionary or False, column_encoding=encoding or None,
                compression_level={n: int(lay.zstd_level) for n, lay in layouts.items()})


def chunk_overhead_bytes(coded: CodedColumn, chunks: int | None = None) -> int:
    """Bytes of the per-chunk integers of ``chunks`` chunks (all by default) before compression:
    8 for the reference, 8 more for the start under a difference predictor. An upper estimate
    used to compare predictors; the per-chunk table is written and measured by the caller."""
    per_chunk = 16 if coded.predictor in DIFFERENCE_PREDICTORS else 8
    return per_chunk * (coded.chunks if chunks is None else chunks)


# -- one list column or one column per code (store/packed_codes.py) ----------------------------
#: Codes the packing trial writes at most (a taller sample is cut to its first rows): 2^18
#: codes took about 0.1 s a layout; the choice only matters where per-chunk costs dominate,
#: which a short sample shows as well as a long one.
PACKING_CELLS = 1 << 18
#: Packed only when its estimate is at most this fraction of one column per code: a read of a
#: few columns (a SQL projection, ``to_numpy(columns=...)``) then reads every code of its rows,
#: so a gain within the estimate's noise is not worth it. Measured (benchmarks/packed_codes.py,
#: 0.01 std): nci60 0.51, speech 0.67, meats 0.46 pass; chicago 0.99 and hfi 0.99 do not; an
#: invented 10^6 x 100 low-rank table estimated 1.03.
PACKING_GAIN = 0.95


def _packed_table(codes: np.ndarray, nulls: np.ndarray | None) -> pa.Table:
    return pa.table({layout.PACKED_CODES: packed_codes.pack(codes, nulls)})


def _file_bytes(table: pa.Table, **options: object) -> int:
    """Bytes of ``table`` written as a row file is (zstd, no Arrow schema, no statistics on
    codes, page checksums): footer included."""
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink, store_schema=False, write_statistics=False, write_page_checksum=True,
                   **options)
    return len(sink.getvalue())


def _packed_options(lay: ColumnLayout) -> dict:
    """Writer options of the packed column under ``lay`` (options name the list's values)."""
    return writer_options({packed_codes.LEAF_PATH: lay})


def choose_packed_layout(column: pa.Array, *, encodings: Sequence[str] = ENCODINGS,
                         levels: Sequence[int] = ZSTD_LEVELS) -> LayoutChoice:
    """The layout (encoding and zstd level of the list's values) under which the packed code
    column ``column`` (a sample of rows) is smallest: every encoding at level 3, then the best
    encoding at the other ``levels`` (the two stages of :func:`choose_layouts`)."""
    table = pa.table({layout.PACKED_CODES: column})
    base_level = 3 if 3 in levels else int(levels[0])
    sizes = {}
    for encoding in encodings:
        lay = ColumnLayout(encoding, base_level)
        sizes[lay] = _column_bytes(table, **_packed_options(lay))[layout.PACKED_CODES]
    best_encoding = min(sizes, key=lambda lay: (sizes[lay], encodings.index(lay.encoding))).encoding
    for level in levels:
        if level != base_level:
            lay = ColumnLayout(best_encoding, int(level))
            sizes[lay] = _column_bytes(table, **_packed_options(lay))[layout.PACKED_CODES]
    best = min(sizes, key=lambda lay: (sizes[lay], encodings.index(lay.encoding), lay.zstd_level))
    return LayoutChoice(best, sizes[best], len(column), sizes)


@dataclass(frozen=True)
class PackingChoice:
    """Whether the residual codes go into one list column (``packed``), with the bytes each
    layout's code columns were estimated to take in the whole table's row files (footer
    entries included) and the rows of the sample the estimate is scaled from."""

    packed: bool
    packed_bytes: int
    columns_bytes: int
    sampled_rows: int


def _scaled(bytes_all: int, bytes_half: int, rows: int, half: int, table_rows: int, groups: int) -> int:
    """Bytes of a table of ``table_rows`` rows in ``groups`` row groups, from the bytes of the
    sample's ``rows`` rows and of its first ``half`` rows: a cost per row (the slope) and a
    fixed cost per row group (footer entries, page headers, zstd frames: the intercept)."""
    per_row = max(bytes_all - bytes_half, 0) / max(rows - half, 1)
    fixed = max(bytes_all - rows * per_row, 0.0)
    return int(round(groups * fixed + table_rows * per_row))


def choose_packing(codes: np.ndarray, nulls: np.ndarray | None, table_rows: int, *,
                   group_rows: int = layout.ROW_GROUP_ROWS, level: int = 3) -> PackingChoice:
    """One list column or one column per code, by trial with the real writer: the sample's
    codes ``codes`` (m, q) zigzag uint32 (NULL where ``nulls`` (m, q)) are written both ways as
    whole in-memory Parquet files (footers included: a column costs its footer entry too),
    each column or the list under its best encoding at zstd ``level``, then again for the
    sample's first half; the two sizes give a cost per row and a fixed cost per row group,
    scaled to ``table_rows`` rows in row groups of ``group_rows``. Packed only when at most
    :data:`PACKING_GAIN` of one column per code. The sample is cut to its first ``PACKING_CELLS // q`` rows (at least 2)."""
    codes = np.asarray(codes)
    m, q = codes.shape
    if q < 2 or m < 2:  # one column: nothing to pack
        return PackingChoice(False, 0, 0, m)
    m = min(m, max(2, PACKING_CELLS // q))
    codes = codes[:m]
    nulls = None if nulls is None or not np.any(nulls[:m]) else np.asarray(nulls[:m], dtype=bool)
    half = m // 2
    groups = max(1, -(-int(table_rows) // group_rows))
    names = [f"c{t}" for t in range(q)]
    arrays = {n: pa.array(codes[:, t], pa.uint32(), mask=None if nulls is None else nulls[:, t])
              for t, n in enumerate(names)}
    chosen = choose_sample_layouts(arrays, levels=(level,))
    column_options = writer_options({n: chosen[n].layout for n in names})
    per_column = pa.table(arrays)
    columns_bytes = _scaled(_file_bytes(per_column, **column_options),
                            _file_bytes(per_column.slice(0, half), **column_options), m, half, table_rows, groups)
    packed_layout = choose_packed_layout(_packed_table(codes, nulls).column(0).combine_chunks(),
                                         levels=(level,)).layout
    packed_options = _packed_options(packed_layout)
    packed_bytes = _scaled(_file_bytes(_packed_table(codes, nulls), **packed_options),
                           _file_bytes(_packed_table(codes[:half], None if nulls is None else nulls[:half]),
                                       **packed_options), m, half, table_rows, groups)
    return PackingChoice(packed_bytes <= PACKING_GAIN * columns_bytes, packed_bytes, columns_bytes, m)
