"""One plan per compress (``udfs/passes/plan.py``): every option is checked, alone, together
and against the source's columns, before any pass reads a row; a rank or basis size given
with a tolerance is honoured and recorded, never silently replaced.

"Before any row is read" is proven with a DuckDB query whose rows cannot be read (DuckDB's
``error()`` raises on the first row): a refusal that came after a pass would surface as
DuckDB's error instead of rankfold's. All tables are invented by code with fixed seeds.
"""

from __future__ import annotations

import duckdb
import numpy as np
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import rankfold
from rankfold.cli import cli_spelling, main
from rankfold.udfs.passes.options import CompressOptions

# three numeric columns (a, b, c), a BIGINT k usable as key, a text column; reading any row
# raises in DuckDB
UNREADABLE = ("SELECT i AS k, i::DOUBLE AS a, (2 * i)::DOUBLE AS b, "
              "CASE WHEN i >= 0 THEN error('a row was read') ELSE 1 END::DOUBLE AS c, "
              "'site' || i::VARCHAR AS label FROM range(50) t(i)")
NUMERIC = "'k', 'a', 'b', 'c'"  # k is numeric unless it is the key

REFUSED = [
    # values, alone
    ({"max_abs_error": -1}, rankfold.InvalidInputError, r"'max_abs_error' option of compress must be a positive number.*Got -1"),
    ({"max_std_error": 0}, rankfold.InvalidInputError, r"'max_std_error' .* positive number.*Got 0"),
    ({"rel_error": float("nan")}, rankfold.InvalidInputError, r"'rel_error' .* positive number.*Got nan"),
    ({"max_abs_error": True}, rankfold.InvalidInputError, r"'max_abs_error' .* positive number.*Got True"),
    ({"max_abs_error": "0.1"}, rankfold.InvalidInputError, r"'max_abs_error' .* positive number.*Got '0\.1'"),
    ({"max_abs_error": {"a": -0.5}}, rankfold.InvalidInputError, r"'max_abs_error' .* positive number.*Got -0\.5"),
    ({"max_abs_error": {}}, rankfold.InvalidInputError, r"'max_abs_error' option of compress got an empty mapping"),
    ({"exact_columns": [3]}, rankfold.InvalidInputError, r"'exact_columns' option of compress must be column names"),
    # names against the source's columns
    ({"max_abs_error": {"zz": 0.1}}, rankfold.InvalidInputError,
     r"'max_abs_error' option of compress names columns that are not numeric columns of the source "
     rf".*: 'zz'\. Numeric columns: {NUMERIC}\. Name only these\."),
    ({"max_std_error": {"a": 0.1, "label": 1.0}}, rankfold.InvalidInputError,
     rf"'max_std_error' .* not numeric columns .*: 'label'\. Numeric columns: {NUMERIC}\."),
    ({"key": "k", "rel_error": {"k": 0.1}}, rankfold.InvalidInputError,
     r"'rel_error' .* 'k' \('k' is kept exactly, as key or exact_columns: no target applies\)\. "
     r"Numeric columns: 'a', 'b', 'c'\."),
    ({"key": "nope"}, rankfold.InvalidInputError, r"no column 'nope' \(named in key/exact_columns\)\. Its columns are \['k', 'a'"),
    ({"exact_columns": ["a", "nope"]}, rankfold.InvalidInputError, r"no column 'nope'"),
    # sizes against the number of numeric columns (the schema gives it)
    ({"rank": 5}, rankfold.RankTooLargeError, r"'rank' .* at most min\(rows, numeric columns\) = 4 .*\(4 numeric columns\)\. Got 5"),
    ({"rank": 5, "max_abs_error": 0.05}, rankfold.RankTooLargeError, r"= 4 .*Got 5"),
    ({"n_columns": 5}, rankfold.RankTooLargeError, r"'n_columns' .* at most the 4 numeric columns\. Got 5"),
    ({"rank": 3, "n_columns": 2}, rankfold.RankTooLargeError, r"'n_columns' .* at least the rank \(3\)"),
    # options together
    ({"rank": 2, "rel_error": 0.1}, rankfold.InvalidInputError, r"either 'rank' or 'rel_error'"),
    ({"n_columns": 2, "rel_error": 0.1}, rankfold.InvalidInputError, r"'rel_error' without 'n_columns'"),
    ({"n_rows": 4, "link": "optimal", "rel_error": 0.1}, rankfold.InvalidInputError, r"'rel_error' without 'n_rows'"),
    ({"target_bytes": 10**6, "rank": 2}, rankfold.InvalidInputError, r"'target_bytes' alone"),
    ({"target_bytes": 10**6, "n_columns": 2}, rankfold.InvalidInputError, r"'target_bytes' alone"),
    ({"target_bytes": 10**6, "max_std_error": 0.1}, rankfold.InvalidInputError, r"'target_bytes' alone"),
    ({"n_rows": 4, "link": "optimal"}, rankfold.InvalidInputError, r"n_rows=4 needs 'rank' or 'n_columns'"),
    ({"rank": 2, "link": "cx", "n_rows": 3}, rankfold.InvalidInputError, r"'cx' link .* keeps no anchor rows"),
    ({"rank": 2, "row_method": "leverage"}, rankfold.InvalidInputError, r"'cx' link .* keeps no anchor rows"),
    ({"method": "svd", "rank": 2, "n_columns": 3}, rankfold.InvalidInputError,
     r"method='svd' keeps synthetic scores.*'n_columns' would have no effect"),
    ({"method": "svd", "link": "optimal"}, rankfold.InvalidInputError, r"method='svd' .*'link' would have no effect"),
    ({"method": "svd", "column_method": "leverage"}, rankfold.InvalidInputError, r"method='svd' .*'column_method'"),
    ({"method": "svd", "max_abs_error": 0.1, "basis_precision": "tolerance"}, rankfold.InvalidInputError,
     r"method='svd' .*'basis_precision' would have no effect"),
    ({"rank": 2, "residual": "quantized"}, rankfold.InvalidInputError, r"residual='quantized' needs max_abs_error or max_std_error"),
    ({"target_bytes": 10**6, "residual": "corrections"}, rankfold.InvalidInputError, r"residual='corrections' needs"),
    ({"rank": 2, "basis_precision": "tolerance"}, rankfold.InvalidInputError, r"basis_precision='tolerance' needs"),
    ({"rank": 2, "replace": True}, rankfold.InvalidInputError, r"replace=True has no effect here"),
    ({"rank": 2, "link": "optimal", "replace": False}, rankfold.InvalidInputError,
     r"replace=False has no effect here: column_method='pivoted_qr' and row_method='qdeim'"),
    ({"link": "textbook"}, rankfold.InvalidInputError, r"'textbook' link needs sampled columns"),
    ({"rank": 2, "sketch_rows": 10, "max_abs_error": 0.1}, rankfold.InvalidInputError, r"sketch_rows=10 cannot be combined"),
    ({"rank": 2, "storage_options": {"anon": True}}, rankfold.InvalidInputError,
     r"storage_options are file-system options of a URL .* would have no effect"),
]


@pytest.mark.parametrize("options, error, message", REFUSED)
def test_refused_before_any_row_is_read(tmp_path, options, error, message):
    # the rule table of plan.py (each rule is this project's own; no outside source)
    con = duckdb.connect()
    try:
        with pytest.raises(error, match=message):
            rankfold.compress(UNREADABLE, tmp_path / "x.rankfold", connection=con, **options)
    finally:
        con.close()
    assert list(tmp_path.iterdir()) == []


def test_the_unreadable_source_does_raise_when_read(tmp_path):
    # the proof above depends on it: DuckDB's error() raises on the first row read
    con = duckdb.connect()
    try:
        with pytest.raises(duckdb.Error, match="a row was read"):
            rankfold.compress(UNREADABLE, tmp_path / "x.rankfold", connection=con, rank=2)
    finally:
        con.close()


def _low_rank(m: int = 400, n: int = 12, k: int = 3, seed: int = 4) -> np.ndarray:
    """Invented: rank k plus 1% noise, columns in different units."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((m, k)) @ rng.standard_normal((k, n))
    return (x + 0.01 * rng.standard_normal((m, n))) * np.geomspace(0.5, 40.0, n)


def _stages(events: list[dict]) -> set[str]:
    return {e.get("stage") for e in events}


def test_a_numpy_source_is_refused_before_the_profile_pass(tmp_path):
    # the same order for an in-memory source: the progress callback sees no pass at all
    events: list[dict] = []
    with pytest.raises(rankfold.InvalidInputError, match=r"'max_abs_error' .* names columns .*'zz'"):
        rankfold.compress(_low_rank(), tmp_path / "x.rankfold", max_abs_error={"zz": 0.1},
                          progress=events.append)
    assert events == []
    rankfold.compress(_low_rank(), tmp_path / "y.rankfold", rank=2, progress=events.append)
    assert "profile" in _stages(events)  # the callback does report passes


def _within(archive: rankfold.Archive, x: np.ndarray, tolerance: np.ndarray) -> None:
    # the reference is the invented table itself; numpy.abs of the difference, cell by cell
    error = np.abs(archive.to_numpy() - x)
    assert np.all(error <= tolerance[None, :]), float(np.max(error - tolerance[None, :]))


@pytest.mark.parametrize("options, rank, n_columns, n_rows", [
    ({"rank": 4, "max_abs_error": 0.05}, 4, 8, 0),           # was: the rank chosen anew
    ({"rank": 3, "n_columns": 4, "max_abs_error": 0.5}, 3, 4, 0),  # was: 6 columns
    ({"rank": 5, "max_std_error": 0.02}, 5, 10, 0),
    ({"n_columns": 5}, 3, 5, 0),                              # with the default max_std_error
    ({"rank": 2, "n_rows": 7, "link": "optimal", "max_std_error": 0.05}, 2, 4, 7),
    ({"rank": 3, "method": "svd", "max_std_error": 0.05}, 3, 3, 0),
])
def test_a_size_given_with_a_tolerance_is_honoured_and_recorded(tmp_path, options, rank, n_columns, n_rows):
    x = _low_rank()
    archive = rankfold.compress(x, tmp_path / "h.rankfold", **options)
    method = archive.manifest["method"]
    assert (method["rank"], method["n_columns"], method["n_rows"]) == (rank, n_columns, n_rows)
    assert method["rank_reason"].startswith("given size")
    if options.get("method") != "svd":
        assert len(archive.basis_columns) == n_columns
    assert len(archive.anchor_rows) == n_rows
    std = x.std(axis=0)  # numpy.std (population), as the tolerance is defined (README)
    tolerance = (np.full(x.shape[1], options["max_abs_error"]) if "max_abs_error" in options
                 else options.get("max_std_error", 0.05) * std * (1 + 1e-12))
    _within(archive, x, tolerance)


def test_the_size_decides_the_archive_not_the_planner(tmp_path):
    # without a size the planner picks the basis; with one, the archive follows it: two sizes
    # give two different archives (the test of the honoured size above could not tell a
    # planner that happened to pick the same size)
    x = _low_rank()
    chosen = rankfold.compress(x, tmp_path / "free.rankfold", max_abs_error=0.5)
    free_columns = chosen.manifest["method"]["n_columns"]
    other = 2 if free_columns != 2 else 4
    fixed = rankfold.compress(x, tmp_path / "fixed.rankfold", max_abs_error=0.5, n_columns=other)
    assert fixed.manifest["method"]["n_columns"] == other != free_columns
    assert fixed.manifest["method"]["options"]["n_columns"] == other


def test_rank_above_the_rows_is_refused_once_they_are_counted(tmp_path):
    # 5 rows x 8 columns: the schema allows rank 6, the row count (known after the profile
    # pass) does not; nothing is encoded or written
    x = _low_rank(m=5, n=8)
    events: list[dict] = []
    with pytest.raises(rankfold.RankTooLargeError,
                       match=r"at most min\(rows, numeric columns\) = 5 .*\(5 rows x 8 numeric columns\)\. Got 6"):
        rankfold.compress(x, tmp_path / "r.rankfold", rank=6, max_std_error=0.1, progress=events.append)
    assert "profile" in _stages(events) and "encode" not in _stages(events)
    with pytest.raises(rankfold.RankTooLargeError, match=r"'n_rows' .* at most the 5 source rows\. Got 7"):
        rankfold.compress(x, tmp_path / "r.rankfold", rank=2, n_rows=7, link="optimal")
    assert list(tmp_path.iterdir()) == []


def test_a_tolerance_may_name_a_column_kept_exactly_beyond_two_to_the_53(tmp_path):
    # the profile pass moves integers beyond 2^53 out of the factors (float64 holds integers
    # exactly only up to 2^53, IEEE 754): a tolerance naming one is met by the exact copy
    rng = np.random.default_rng(8)
    x = _low_rank(m=60, n=4)
    big = pa.array(2**60 + rng.integers(0, 1000, 60), pa.int64())
    table = pa.table({"big": big} | {f"x{j}": x[:, j] for j in range(4)})
    archive = rankfold.compress(table, tmp_path / "b.rankfold", max_abs_error={"big": 0.5, "x1": 0.01})
    assert "big" in archive.manifest["exact_columns"]
    assert archive.rebuild().column("big").to_pylist() == big.to_pylist()
    assert np.max(np.abs(archive.to_numpy(columns=["x1"])[:, 0] - x[:, 1])) <= 0.01


def test_the_manifest_records_the_options_only(tmp_path):
    archive = rankfold.compress(_low_rank(m=50, n=4), tmp_path / "o.rankfold", rank=2)
    recorded = set(archive.manifest["method"]["options"])
    assert {"numeric", "passthrough", "source"}.isdisjoint(recorded)
    assert recorded <= {f for f in CompressOptions.__dataclass_fields__}


@pytest.mark.parametrize("flags, options", [
    (["--method", "svd", "--n-columns", "3"], {"method": "svd", "n_columns": 3}),
    (["--max-abs-error=-1"], {"max_abs_error": -1.0}),
    (["--max-abs-error", "zz=0.1"], {"max_abs_error": {"zz": 0.1}}),
    (["--rank", "3", "--n-columns", "4", "--rel-error", "0.1"], {"rank": 3, "n_columns": 4, "rel_error": 0.1}),
    (["--rank", "2", "--residual", "quantized"], {"rank": 2, "residual": "quantized"}),
])
def test_the_command_line_shows_the_same_refusals(tmp_path, capsys, flags, options):
    x = _low_rank(m=40, n=4)
    source = tmp_path / "t.parquet"
    import pyarrow.parquet as pq

    pq.write_table(pa.table({f"x{j}": x[:, j] for j in range(4)}), source)
    with pytest.raises(rankfold.RankfoldError) as library:
        rankfold.compress(str(source), tmp_path / "lib.rankfold", **options)
    code = main(["compress", str(source), str(tmp_path / "cli.rankfold"), *flags])
    _, err = capsys.readouterr()
    assert code == 1
    assert err == f"rankfold: error: {cli_spelling(str(library.value))}\n"
    assert not (tmp_path / "cli.rankfold").exists() and not (tmp_path / "lib.rankfold").exists()


# -- every combination: refused before reading, or honoured ---------------------------------------
WIDTH, HEIGHT = 6, 80
_UNREADABLE_WIDE = ("SELECT " + ", ".join(f"(i * {j + 1})::DOUBLE AS x{j}" for j in range(WIDTH - 1))
                    + f", CASE WHEN i >= 0 THEN error('a row was read') ELSE 1 END::DOUBLE AS x{WIDTH - 1}"
                    + f" FROM range({HEIGHT}) t(i)")


@st.composite
def option_sets(draw):
    """Options drawn together, sizes within the table's rows (the row count is the one thing
    only a pass can tell) but possibly beyond its columns."""
    choices = {
        "rank": st.sampled_from([1, 2, 4, 7]),
        "n_columns": st.sampled_from([1, 3, 5, 8]),
        "n_rows": st.sampled_from([4, 9]),
        "method": st.sampled_from(["cur", "svd"]),
        "link": st.sampled_from(["cx", "optimal"]),
        "column_method": st.sampled_from(["leverage"]),
        "replace": st.sampled_from([True]),
        "max_abs_error": st.sampled_from([0.5, {"x1": 0.2}]),
        "max_std_error": st.sampled_from([0.1]),
        "rel_error": st.sampled_from([0.2]),
        "target_bytes": st.sampled_from([10**6]),
        "residual": st.sampled_from(["corrections"]),
    }
    names = draw(st.lists(st.sampled_from(sorted(choices)), max_size=4, unique=True))
    return {name: draw(choices[name]) for name in names}


@settings(max_examples=80, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(options=option_sets())
def test_every_combination_is_refused_before_reading_or_honoured(tmp_path_factory, options):
    # the rule table of plan.py against its promise: no size given is silently replaced
    folder = tmp_path_factory.mktemp("combination")
    x = _low_rank(m=HEIGHT, n=WIDTH, k=2, seed=9)
    table = pa.table({f"x{j}": x[:, j] for j in range(WIDTH)})
    try:
        archive = rankfold.compress(table, folder / "a.rankfold", **options)
    except rankfold.InvalidInputError as refused:
        con = duckdb.connect()
        try:  # the same refusal, from a source that cannot be read
            with pytest.raises(type(refused)) as again:
                rankfold.compress(_UNREADABLE_WIDE, folder / "b.rankfold", connection=con, **options)
        finally:
            con.close()
        assert str(again.value).split(" of the source ")[0] == str(refused).split(" of the source ")[0]
        assert list(folder.iterdir()) == []
        return
    method = archive.manifest["method"]
    if "rank" in options:
        assert method["rank"] == options["rank"]
    drawn = options.get("replace") and options.get("column_method") == "leverage"
    if "n_columns" in options and not drawn:
        assert method["n_columns"] == options["n_columns"]
    elif "rank" in options and not drawn and method["kind"] == "cur" and "n_columns" not in options:
        assert method["n_columns"] == min(2 * options["rank"], WIDTH)
    if "n_rows" in options:
        assert method["n_rows"] == options["n_rows"] or (options.get("replace") and method["n_rows"] <= options["n_rows"])


# -- the size model the plan hands its sizes to ------------------------------------------------
def test_predicted_residuals_match_least_squares_and_the_truncated_svd():
    from rankfold.udfs.factor.sketch import Spectrum
    from rankfold.udfs.passes import targets

    a = _low_rank(m=200, n=7, k=3, seed=12)
    a = a - a.mean(axis=0)
    cur = targets.PredictedResiduals.of_cur(a, np.ones(7), 200)  # F = A: F^T F = A^T A
    for c in range(8):
        basis = a[:, cur.order[:c]]
        # numpy.linalg.lstsq: residual of each column after the least-squares fit on the basis
        fit = basis @ np.linalg.lstsq(basis, a, rcond=None)[0] if c else np.zeros_like(a)
        np.testing.assert_allclose(cur.res[c], np.linalg.norm(a - fit, axis=0), rtol=1e-9, atol=1e-9 * np.linalg.norm(a))
    u, s, vt = np.linalg.svd(a, full_matrices=False)
    svd = targets.PredictedResiduals.of_svd(Spectrum(s, vt.T), np.ones(7), 200)
    for k in range(8):
        # Eckart-Young: the truncated SVD (numpy.linalg.svd) leaves A - A_k, column by column
        truncated = (u[:, :k] * s[:k]) @ vt[:k]
        np.testing.assert_allclose(svd.res[k], np.linalg.norm(a - truncated, axis=0), rtol=1e-9,
                                   atol=1e-9 * np.linalg.norm(a))


def test_the_tolerance_planner_keeps_a_given_size():
    from rankfold.udfs.passes import targets

    a = _low_rank(m=300, n=10, k=3, seed=13)
    predicted = targets.PredictedResiduals.of_cur(a - a.mean(axis=0), np.ones(10), 300)
    coding = targets.ToleranceCoding("auto", "exact", a.std(axis=0), np.full(10, 8.0))
    tolerance = np.full(10, 0.05)
    free = targets.plan_for_tolerance(predicted, tolerance, coding,
                                      [((c + 1) // 2, c) for c in range(6)], reason="free")
    given = targets.plan_for_tolerance(predicted, tolerance, coding, [(4, 7)], reason="given")
    assert (given.rank, given.columns, given.reason) == (4, 7, "given")
    assert list(given.basis) == list(predicted.order[:7])
    assert free.columns != 7 and free.predicted_bytes < given.predicted_bytes


def test_a_connection_that_is_not_duckdbs_is_refused_before_use(tmp_path):
    with pytest.raises(rankfold.InvalidInputError, match=r"'connection' option of compress must be a DuckDB connection.*Got int"):
        rankfold.compress("panel", tmp_path / "c.rankfold", connection=42, rank=1)
    assert list(tmp_path.iterdir()) == []
