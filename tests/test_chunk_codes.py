"""The integer-code codec (udfs/store/chunk_codes.py) and its layout trial (code_layout.py).

Round trips are exact for every predictor (hypothesis tries NULLs, empty and one-row chunks,
codes at the edge of the accepted range); the stored parts are checked against independent
numpy computations (numpy.diff for delta coding, a per-chunk numpy.min for the references,
numpy.min_scalar_type for the narrowest type); the SQL decoder is checked against the numpy
decoder cell by cell; the layout trial against pyarrow's own file metadata. Codes are drawn by
seeded generators or by hypothesis; no data here is real.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from rankfold.udfs.errors import CorruptArchiveError, InvalidInputError, RankfoldError
from rankfold.udfs.store import chunk_codes as cc
from rankfold.udfs.store import code_layout as cl

LIMIT = cc.CODE_LIMIT


@st.composite
def columns(draw, max_rows: int = 120):
    """(codes int64, valid mask, chunk_rows): magnitudes from tiny to the accepted limit."""
    rows = draw(st.integers(0, max_rows))
    chunk_rows = draw(st.integers(1, 17))
    bound = draw(st.sampled_from([3, 300, 70_000, 2**40, LIMIT]))
    codes = draw(st.lists(st.integers(-bound, bound), min_size=rows, max_size=rows))
    valid = draw(st.lists(st.booleans(), min_size=rows, max_size=rows))
    return np.array(codes, dtype=np.int64), np.array(valid, dtype=bool), chunk_rows


def _chunk_slices(rows: int, k: int):
    return [slice(s, min(s + k, rows)) for s in range(0, rows, k)]


@settings(max_examples=200, deadline=None)
@given(columns(), st.sampled_from(cc.PREDICTORS), st.sampled_from(cc.REFERENCES))
def test_round_trip_is_exact_for_every_predictor(column, predictor, reference):
    codes, valid, k = column
    coded = cc.encode_codes(codes, valid, predictor, chunk_rows=k, reference=reference)
    decoded, decoded_valid = cc.decode_codes(coded)
    assert decoded.dtype == np.int64 and decoded.shape == codes.shape
    np.testing.assert_array_equal(decoded_valid, valid)
    np.testing.assert_array_equal(decoded[valid], codes[valid])
    assert not decoded[~valid].any()                      # not-valid rows decode to 0
    assert coded.chunks == -(-codes.size // k)


@settings(max_examples=120, deadline=None)
@given(columns(), st.sampled_from(cc.PREDICTORS), st.sampled_from(cc.REFERENCES))
def test_stored_parts_match_independent_numpy_computation(column, predictor, which):
    codes, valid, k = column
    coded = cc.encode_codes(codes, valid, predictor, chunk_rows=k, reference=which)
    per_chunk = []
    for c, rows in enumerate(_chunk_slices(codes.size, k)):
        kept = codes[rows][valid[rows]]
        if predictor in cc.DIFFERENCE_PREDICTORS and kept.size:
            kept = np.concatenate([[0], np.diff(kept)])
        per_chunk.append(kept)
    everything = np.concatenate(per_chunk) if per_chunk else np.zeros(0, dtype=np.int64)
    column_min = everything.min() if everything.size else 0
    stored_all = []
    for c, rows in enumerate(_chunk_slices(codes.size, k)):
        kept = codes[rows][valid[rows]]
        if predictor in cc.DIFFERENCE_PREDICTORS:
            # delta coding within the chunk: numpy.diff, first valid row stored as 0
            stored = np.concatenate([[0], np.diff(kept)]) if kept.size else kept
            assert coded.starts[c] == (kept[0] if kept.size else 0)
        else:
            stored = kept
            assert coded.starts[c] == 0
        # the chunk's minimum, or the column's (numpy.min)
        reference = column_min if which == "column" else (stored.min() if stored.size else 0)
        assert coded.references[c] == reference
        np.testing.assert_array_equal(coded.offsets[rows][valid[rows]].astype(np.int64), stored - reference)
        assert not coded.offsets[rows][~valid[rows]].any()
        stored_all.append(stored - reference)
    largest = int(np.concatenate(stored_all).max()) if any(s.size for s in stored_all) else 0
    # the narrowest unsigned type holding the largest offset (numpy.min_scalar_type)
    assert coded.offsets.dtype == np.min_scalar_type(largest)


@settings(max_examples=100, deadline=None)
@given(columns(), st.sampled_from(cc.PREDICTORS), st.sampled_from(cc.REFERENCES), st.data())
def test_decode_rows_reads_only_its_own_chunks(column, predictor, reference, data):
    codes, valid, k = column
    coded = cc.encode_codes(codes, valid, predictor, chunk_rows=k, reference=reference)
    start = data.draw(st.integers(0, codes.size))
    stop = data.draw(st.integers(start, codes.size))
    full, _ = cc.decode_codes(coded)
    # damage every chunk outside [start, stop): a decoder that reads them would go wrong
    first, last = start // k, max(stop - 1, start) // k
    offsets, references, starts = coded.offsets.copy(), coded.references.copy(), coded.starts.copy()
    outside = np.ones(coded.chunks, dtype=bool)
    outside[first:last + 1] = False
    references[outside] += 12345
    if predictor in cc.DIFFERENCE_PREDICTORS:
        starts[outside] -= 777
    for c in np.flatnonzero(outside):
        offsets[c * k:(c + 1) * k] = np.iinfo(offsets.dtype).max // 2
    damaged = cc.CodedColumn(predictor, k, offsets, coded.valid, references, starts)
    got, got_valid = cc.decode_rows(damaged, start, stop)
    np.testing.assert_array_equal(got, full[start:stop])
    np.testing.assert_array_equal(got_valid, valid[start:stop])


def test_edge_shapes_empty_one_row_chunks_and_chunks_without_codes():
    for predictor in cc.PREDICTORS:
        empty = cc.encode_codes(np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool), predictor, chunk_rows=4)
        assert empty.rows == 0 and empty.chunks == 0 and empty.offsets.dtype == np.uint8
        assert cc.decode_codes(empty)[0].shape == (0,)
        codes = np.array([5, -LIMIT, LIMIT, 7, 0, 0, 0, 0, 9], dtype=np.int64)
        valid = np.array([1, 1, 1, 1, 0, 0, 0, 0, 1], dtype=bool)    # chunk 1 (rows 4..7) has no codes
        for k in (1, 4):
            coded = cc.encode_codes(codes, valid, predictor, chunk_rows=k)
            np.testing.assert_array_equal(cc.decode_codes(coded)[0][valid], codes[valid])
        one_row = cc.encode_codes(codes, valid, predictor, chunk_rows=1)
        assert not one_row.offsets.any()          # every stored value is its chunk's own minimum


def test_codes_beyond_the_limit_are_refused_with_what_to_do():
    valid = np.ones(3, dtype=bool)
    for bad in (LIMIT + 1, -LIMIT - 1, np.iinfo(np.int64).max, np.iinfo(np.int64).min):
        codes = np.array([0, bad, 1], dtype=np.int64)
        with pytest.raises(InvalidInputError, match=r"beyond \+-2\*\*61.*larger step") as info:
            cc.encode_codes(codes, valid, "previous")
        assert isinstance(info.value, RankfoldError) and str(bad) in str(info.value)
    # the same extreme values at rows that are not valid are ignored
    codes = np.array([0, np.iinfo(np.int64).min, 1], dtype=np.int64)
    coded = cc.encode_codes(codes, np.array([1, 0, 1], dtype=bool), "previous")
    np.testing.assert_array_equal(cc.decode_codes(coded)[0], [0, 0, 1])
    np.testing.assert_array_equal(cc.decode_codes(cc.encode_codes(np.array([2**64 - 1], dtype=np.uint64),
                                                                  np.array([False]), "none"))[0], [0])
    with pytest.raises(InvalidInputError, match="beyond"):
        cc.encode_codes(np.array([2**64 - 1], dtype=np.uint64), np.array([True]), "none")


def test_bad_arguments_are_refused():
    codes, valid = np.arange(4), np.ones(4, dtype=bool)
    with pytest.raises(InvalidInputError, match="Unknown predictor 'seasonal'"):
        cc.encode_codes(codes, valid, "seasonal")
    with pytest.raises(InvalidInputError, match="Unknown reference 'median'"):
        cc.encode_codes(codes, valid, "none", reference="median")
    with pytest.raises(InvalidInputError, match="chunk_rows must be a positive integer"):
        cc.encode_codes(codes, valid, "none", chunk_rows=0)
    with pytest.raises(InvalidInputError, match="integer array"):
        cc.encode_codes(codes.astype(float), valid, "none")
    with pytest.raises(InvalidInputError, match="validity mask"):
        cc.encode_codes(codes, valid[:3], "none")
    coded = cc.encode_codes(codes, valid, "none", chunk_rows=2)
    with pytest.raises(InvalidInputError, match=r"rows \[3, 5\) are outside"):
        cc.decode_rows(coded, 3, 5)


def test_parts_that_do_not_fit_together_are_corrupt():
    coded = cc.encode_codes(np.arange(10), np.ones(10, dtype=bool), "previous", chunk_rows=4)
    with pytest.raises(CorruptArchiveError, match=r"references must be int64 of shape \(3,\)"):
        cc.CodedColumn("previous", 4, coded.offsets, coded.valid, coded.references[:2], coded.starts)
    with pytest.raises(CorruptArchiveError, match="unsigned"):
        cc.CodedColumn("previous", 4, coded.offsets.astype(np.int64), coded.valid, coded.references,
                       coded.starts)
    with pytest.raises(CorruptArchiveError, match="2\\*\\*63"):
        cc.CodedColumn("previous", 4, np.full(10, 2**63, dtype=np.uint64), coded.valid, coded.references,
                       coded.starts)
    with pytest.raises(CorruptArchiveError, match="keeps no chunk starts"):
        cc.CodedColumn("none", 4, coded.offsets, coded.valid, coded.references, coded.starts + 1)


# -- the SQL decoder against the numpy decoder ----------------------------------------------------

@pytest.fixture(scope="module")
def con():
    connection = duckdb.connect()
    yield connection
    connection.close()


def _sql_decode(con, coded: dict[str, cc.CodedColumn], k: int, lookup_row: int | None = None):
    rows = next(iter(coded.values())).rows
    con = con.cursor()              # a fresh cursor: no result of an earlier example left open
    offsets = pa.table({"file_row_number": pa.array(np.arange(rows, dtype=np.int64)),
                        **{name: c.offsets_array() for name, c in coded.items()}})
    con.register("coded offsets", offsets)
    con.register('chunk "table"', cc.chunk_table(coded))
    try:
        predictors = {name: c.predictor for name, c in coded.items()}
        if lookup_row is None:
            sql = cc.decode_sql("coded offsets", 'chunk "table"', predictors, chunk_rows=k)
            return con.sql(sql).to_arrow_table().sort_by("file_row_number")
        sql = cc.decode_sql("coded offsets", 'chunk "table"', predictors, chunk_rows=k, lookup=True)
        return con.sql(sql, params={"row": lookup_row}).to_arrow_table()
    finally:
        con.close()


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(columns(max_rows=60), columns(max_rows=60), st.data())
def test_sql_decoder_matches_numpy_cell_by_cell(con, first, second, data):
    codes, valid, k = first
    other = np.resize(second[0], codes.size)          # a second column of the same rows
    other_valid = np.resize(second[1], codes.size) if second[1].size else np.zeros(codes.size, dtype=bool)
    coded = {}
    for name, (q, v) in {'x "1"': (codes, valid), "x;2": (other, other_valid)}.items():
        coded[name] = cc.encode_codes(q, v, data.draw(st.sampled_from(cc.PREDICTORS)), chunk_rows=k,
                                      reference=data.draw(st.sampled_from(cc.REFERENCES)))
    result = _sql_decode(con, coded, k)
    assert result.num_rows == codes.size
    np.testing.assert_array_equal(result["file_row_number"].to_numpy(), np.arange(codes.size))
    for name, c in coded.items():
        expected, expected_valid = cc.decode_codes(c)
        got = result[name]
        assert got.type == pa.int64()
        np.testing.assert_array_equal(~got.is_null().to_numpy(zero_copy_only=False), expected_valid)
        np.testing.assert_array_equal(got.fill_null(0).to_numpy(), expected)
    if codes.size:
        row = data.draw(st.integers(0, codes.size - 1))
        one = _sql_decode(con, coded, k, lookup_row=row)
        assert one["file_row_number"].to_pylist() == [row]
        for name, c in coded.items():
            q, v = cc.decode_rows(c, row, row + 1)
            assert one[name].to_pylist() == [int(q[0]) if v[0] else None]


def test_sql_decoder_reads_parquet_with_file_row_numbers(con, tmp_path):
    rng = np.random.default_rng(14)
    codes = np.cumsum(rng.integers(-3, 4, 1000))
    valid = rng.random(1000) > 0.1
    coded = {"q": cc.encode_codes(codes, valid, "previous", chunk_rows=64)}
    path = tmp_path / "offsets.parquet"
    pq.write_table(pa.table({"q": coded["q"].offsets_array()}), path, row_group_size=128)
    con.read_parquet(str(path), file_row_number=True).create_view("stored")
    con.register("chunks", cc.chunk_table(coded))
    got = con.sql(cc.decode_sql("stored", "chunks", {"q": "previous"}, chunk_rows=64)
                  ).to_arrow_table().sort_by("file_row_number")
    np.testing.assert_array_equal(got["q"].fill_null(0).to_numpy(), np.where(valid, codes, 0))
    assert got["q"].null_count == int((~valid).sum())


def test_decode_sql_refuses_what_it_cannot_write():
    with pytest.raises(InvalidInputError, match="at least one column"):
        cc.decode_sql("a", "b", {})
    with pytest.raises(InvalidInputError, match="Unknown predictor"):
        cc.decode_sql("a", "b", {"x": "cubic"})
    with pytest.raises(InvalidInputError, match="chunk_rows"):
        cc.decode_sql("a", "b", {"x": "none"}, chunk_rows="8; DROP TABLE a")
    with pytest.raises(InvalidInputError, match="same chunk size"):
        cc.chunk_table({"a": cc.encode_codes(np.arange(3), np.ones(3, bool), "none", chunk_rows=2),
                        "b": cc.encode_codes(np.arange(3), np.ones(3, bool), "none", chunk_rows=3)})


# -- the layout trial ------------------------------------------------------------------------------

def _coded_table(seed: int, rows: int = 3000, k: int = 256) -> dict[str, cc.CodedColumn]:
    rng = np.random.default_rng(seed)
    walk = np.cumsum(rng.integers(-2, 3, rows))
    valid = rng.random(rows) > 0.05
    return {"walk|none": cc.encode_codes(walk, valid, "none", chunk_rows=k),
            "walk|previous": cc.encode_codes(walk, valid, "previous", chunk_rows=k),
            "runs|none": cc.encode_codes(np.repeat(rng.integers(0, 5, rows // 50 + 1), 50)[:rows],
                                         np.ones(rows, bool), "none", chunk_rows=k)}


def test_sample_chunks_is_seeded_distinct_and_sorted():
    a = cl.sample_chunks(100, seed=3, count=8)
    np.testing.assert_array_equal(a, cl.sample_chunks(100, seed=3, count=8))
    assert a.size == 8 and np.all(np.diff(a) > 0) and a.min() >= 0 and a.max() < 100
    assert not np.array_equal(a, cl.sample_chunks(100, seed=4, count=8))
    np.testing.assert_array_equal(cl.sample_chunks(5, seed=0, count=8), np.arange(5))


def test_trial_sizes_are_the_sizes_pyarrow_records_for_the_column_alone():
    coded = _coded_table(1)
    picked = cl.sample_chunks(next(iter(coded.values())).chunks, seed=0, count=4)
    arrays = {name: cl.sampled_offsets(c, picked) for name, c in coded.items()}
    layouts = [cl.ColumnLayout("DELTA_BINARY_PACKED", 3), cl.ColumnLayout("dictionary", 9)]
    sizes = cl.trial_sizes(arrays, layouts)
    for name, array in arrays.items():
        for layout in layouts:
            # reference: the column written alone; pyarrow's FileMetaData of that file
            sink = pa.BufferOutputStream()
            pq.write_table(pa.table({name: array}), sink, compression="zstd",
                           **({"use_dictionary": True} if layout.encoding == "dictionary" else
                              {"use_dictionary": False, "column_encoding": {name: layout.encoding}}),
                           compression_level=layout.zstd_level)
            meta = pq.ParquetFile(pa.BufferReader(sink.getvalue())).metadata
            assert sizes[name][layout] == meta.row_group(0).column(0).total_compressed_size


def test_chosen_layout_is_the_smallest_and_the_file_written_with_it_round_trips():
    coded = _coded_table(2)
    choice = cl.choose_layouts(coded, seed=7, sample=4)
    assert set(choice) == set(coded)
    for name, c in choice.items():
        # stage 1: every encoding at level 3; stage 2: the best of those at the other levels
        at_three = {lay.encoding: size for lay, size in c.sizes.items() if lay.zstd_level == 3}
        assert set(at_three) == set(cl.ENCODINGS)
        stage_one = min(cl.ENCODINGS, key=lambda e: (at_three[e], cl.ENCODINGS.index(e)))
        assert {lay for lay in c.sizes if lay.zstd_level != 3} == \
            {cl.ColumnLayout(stage_one, level) for level in cl.ZSTD_LEVELS if level != 3}
        assert c.layout.encoding == stage_one
        assert c.sampled_bytes == min(c.sizes.values()) == c.sizes[c.layout]
        assert c.sampled_rows == 4 * 256
    # delta coding pays off on the random walk (common practice: differences of a walk are small)
    walk = choice["walk|none"].sampled_bytes
    assert choice["walk|previous"].sampled_bytes < walk
    sink = pa.BufferOutputStream()
    table = pa.table({name: c.offsets_array() for name, c in coded.items()})
    pq.write_table(table, sink, **cl.writer_options({n: c.layout for n, c in choice.items()}))
    back = pq.read_table(pa.BufferReader(sink.getvalue()))
    assert back.equals(table)
    meta = pq.ParquetFile(pa.BufferReader(sink.getvalue())).metadata
    for j, name in enumerate(table.column_names):
        written = meta.row_group(0).column(j).encodings
        expected = "RLE_DICTIONARY" if choice[name].layout.encoding == "dictionary" else choice[name].layout.encoding
        assert expected in written, (name, written)


def test_per_column_plan_is_measured_in_one_file_like_each_layout_alone():
    coded = _coded_table(4)
    picked = cl.sample_chunks(next(iter(coded.values())).chunks, seed=1, count=3)
    arrays = {name: cl.sampled_offsets(c, picked) for name, c in coded.items()}
    plan = {"walk|none": cl.ColumnLayout("BYTE_STREAM_SPLIT", 1), "walk|previous": cl.ColumnLayout("PLAIN", 19),
            "runs|none": cl.ColumnLayout("dictionary", 9)}
    together = cl.trial_sizes(arrays, plan)
    for name, layout in plan.items():
        alone = cl.trial_sizes({name: arrays[name]}, [layout])
        assert together[name] == alone[name] == {layout: alone[name][layout]}


def test_layout_arguments_are_checked():
    with pytest.raises(InvalidInputError, match="Unknown Parquet encoding 'RLE'"):
        cl.ColumnLayout("RLE", 3)
    with pytest.raises(InvalidInputError, match="zstd level"):
        cl.ColumnLayout("PLAIN", 0)
    with pytest.raises(InvalidInputError, match="at least one"):
        cl.choose_layouts({}, seed=0)
    coded = _coded_table(3)
    coded["short"] = cc.encode_codes(np.arange(10), np.ones(10, bool), "none", chunk_rows=256)
    with pytest.raises(InvalidInputError, match="differ in rows"):
        cl.choose_layouts(coded, seed=0)
    assert cl.chunk_overhead_bytes(coded["walk|previous"]) == 16 * coded["walk|previous"].chunks
    assert cl.chunk_overhead_bytes(coded["walk|none"], chunks=2) == 16


def test_trial_handles_empty_and_all_null_columns():
    empty = cc.encode_codes(np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool), "none")
    assert cl.choose_layouts({"e": empty}, seed=0)["e"].sampled_rows == 0
    nulls = {"n": cc.encode_codes(np.zeros(5, dtype=np.int64), np.zeros(5, dtype=bool), "previous")}
    choice = cl.choose_layouts(nulls, seed=0)["n"]
    assert choice.sampled_rows == 5 and choice.sampled_bytes == min(choice.sizes.values())
    sink = pa.BufferOutputStream()
    pq.write_table(pa.table({"n": nulls["n"].offsets_array()}), sink, **cl.writer_options({"n": choice.layout}))
    assert pq.read_table(pa.BufferReader(sink.getvalue()))["n"].null_count == 5
