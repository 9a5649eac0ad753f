"""Mutation check, run by hand: break one public result on purpose, run the tests that must
notice, put the code back. Every mutation must make at least one test fail.

    python .ci/mutations.py            # every mutation
    python .ci/mutations.py NAME ...   # some of them

Each mutation replaces one exact line of the source (the anchor); when an anchor is no longer
found the code has moved: update the anchor. The file is restored from its text in memory (not
from git), so uncommitted work survives. Not run by .ci/run: it edits the source while it runs.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

# name -> (file, anchor, replacement, tests that must fail)
MUTATIONS = {
    "cell bound loose by 1000x": (
        "udfs/store/reader.py", "        bounds[exact] = 0.0\n        if not serve:",
        "        bounds = bounds * 1000.0\n        bounds[exact] = 0.0\n        if not serve:",
        ["tests/test_bounds_property.py"]),
    "column ledger loose by 1000x": (
        "udfs/store/model.py", '        return self._stat("err_max", np.inf)\n',
        '        return self._stat("err_max", np.inf) * 1000.0\n',
        ["tests/test_bounds_property.py"]),
    "row ledger loose by 1000x": (
        "udfs/store/model.py",
        "        by_row = arithmetic.round_up(row_max[:, None] * self.ledger_scale[col_idx][None, :])",
        "        by_row = arithmetic.round_up(row_max[:, None] * 1000.0 * self.ledger_scale[col_idx][None, :])",
        ["tests/test_bounds_property.py"]),
    "SQL cell bound loose by 1000x": (
        "udfs/sql/functions.py", "        return pa.array(bounds, pa.float64(), mask=missing)",
        "        return pa.array(bounds * 1000.0, pa.float64(), mask=missing)",
        ["tests/test_sql.py"]),
    "SQL scan bound loose by 1000x": (
        "udfs/sql/tables.py", '        middle += [f"{lin} AS __v{s}", f"{raw} AS __e{s}"]',
        '        middle += [f"{lin} AS __v{s}", f"({raw}) * 1000.0 AS __e{s}"]',
        ["tests/test_sql_tables.py"]),
    "aggregate bound loose by 1000x": (
        "udfs/store/aggregate.py", "    bound = np.where(null, 0.0, bound)\n",
        "    bound = np.where(null, 0.0, bound * 1000.0)\n",
        ["tests/test_aggregate.py"]),
    "covariance bound loose by 1000x": (
        "udfs/store/aggregate.py",
        "    names, cov, bound, _, _ = _covariance(reader, columns)\n    return names, cov, bound\n",
        "    names, cov, bound, _, _ = _covariance(reader, columns)\n    return names, cov, bound * 1000.0\n",
        ["tests/test_aggregate.py"]),
    "correlation bound of 2.0": (
        "udfs/store/aggregate.py",
        "        bound = np.where(np.isfinite(bound) & ~bad[:, None] & ~bad[None, :], np.minimum(bound, 2.0), 2.0)",
        "        bound = np.full_like(bound, 2.0)",
        ["tests/test_aggregate.py", "tests/test_sql_tables.py", "tests/test_covariance_stored.py"]),
    "covariance bound loose by 10x": (
        "udfs/store/aggregate.py",
        "    names, cov, bound, _, _ = _covariance(reader, columns)\n    return names, cov, bound\n",
        "    names, cov, bound, _, _ = _covariance(reader, columns)\n    return names, cov, bound * 10.0\n",
        ["tests/test_aggregate.py", "tests/test_covariance_stored.py"]),
    "SQL correlation bound of 2.0": (
        "udfs/sql/functions.py", '                table = _tables.agg.pairs_table(*kind(reader, p["columns"]))\n',
        '                names, value, bound = kind(reader, p["columns"])\n'
        '                table = _tables.agg.pairs_table(names, value, bound * 0.0 + 2.0 if verb == "correlation" else bound)\n',
        ["tests/test_sql_tables.py"]),
    "cell bound of 1e300 (finite, useless)": (
        "udfs/store/reader.py", "        bounds[exact] = 0.0\n        if not serve:",
        "        bounds = np.where(bounds > 0, 1e300, bounds)\n        bounds[exact] = 0.0\n        if not serve:",
        ["tests/test_bounds_property.py"]),
    "values off by half a standard deviation": (
        "udfs/store/reader.py", "        b, q = values.shape\n",
        '        values = values + 0.5 * self.columns_table.column("std").to_numpy()[col_idx][None, :]\n'
        "        b, q = values.shape\n",
        ["tests/test_roundtrip.py", "tests/test_bounds_property.py", "tests/test_sql_matches_numpy.py"]),
    "SQL scan values off by half a standard deviation": (
        "udfs/sql/tables.py", '        middle += [f"{lin} AS __v{s}", f"{raw} AS __e{s}"]',
        "        middle += [f\"({lin}) + {0.5 * reader.columns_table.column('std')[j].as_py()!r} AS __v{s}\", "
        'f"{raw} AS __e{s}"]',
        ["tests/test_sql_tables.py", "tests/test_sql_matches_numpy.py"]),
    "SQL scan integer bound without the rounding": (
        "udfs/store/sql_rebuild.py", '        return f"({r})", bound\n',
        '        return f"({r})", f"({b})"\n',
        ["tests/test_sql_matches_numpy.py"]),
    "SQL scan values not clamped into the range": (
        "udfs/store/sql_rebuild.py", '    clamped = v\n    if np.isfinite(upper):\n',
        '    clamped = v\n    upper = lower = np.inf\n    if np.isfinite(upper):\n',
        ["tests/test_sql_matches_numpy.py"]),
    "older archives' error names not renamed": (
        "udfs/store/manifest_schema.py", "                record[new] = record.pop(old)\n",
        "                pass\n",
        ["tests/test_integrity.py"]),
    "model encoder narrows the offsets to float32": (
        "udfs/store/model.py", '            "offset": self.offset,\n',
        '            "offset": self.offset.astype(np.float32).astype(np.float64),\n',
        ["tests/test_model.py"]),
    "SQL rebuild without the residual codes": (
        "udfs/store/sql_rebuild.py",
        '        value = f"({value}) + CAST(__q{slot} AS DOUBLE) * {sql_literal(float(step))}"\n',
        '        value = f"({value})"\n',
        ["tests/test_sql_tables.py"]),
    "silent rebuild log": (
        "udfs/store/rebuild_log.py", "        text = json.dumps(entry, default=str)\n",
        "        return entry\n        text = json.dumps(entry, default=str)\n",
        ["tests/test_roundtrip.py", "tests/test_sql.py"]),
    "a rank given with a tolerance replaced by the planner's": (
        "udfs/passes/plan.py", "        if self.fixed_basis:\n",
        "        if False:\n",
        ["tests/test_plan.py"]),
    "a per-column target naming no column accepted": (
        "udfs/passes/plan.py", "                if unknown:\n",
        "                if False:\n",
        ["tests/test_plan.py"]),
    "no row ledger: cell bounds a tenth of the column's": (
        "udfs/store/model.py", "        bounds = np.broadcast_to(self.err_max[col_idx][None, :], slack.shape)\n",
        "        bounds = np.broadcast_to(self.err_max[col_idx][None, :] * (0.1 if not self.row_ledger else 1.0),"
        " slack.shape)\n",
        ["tests/test_row_ledger.py"]),
    "no row ledger: SQL scan bound a tenth of the column's": (
        "udfs/store/sql_rebuild.py", "    ledger = sql_literal(float(model.err_max[j]))\n",
        "    ledger = sql_literal(float(model.err_max[j]) * (0.1 if not model.row_ledger else 1.0))\n",
        ["tests/test_row_ledger.py"]),
    "archive size leaves the manifest out": (
        "udfs/store/manifest.py", '        if data + len(text.encode("utf-8")) == total:',
        '        if True:',
        ["tests/test_sizes.py"]),
    "target_bytes not checked as written": (
        "udfs/passes/compress.py",
        "            path = self.writer.commit(self.manifest, self.files, at_most=goal.target_bytes)",
        "            path = self.writer.commit(self.manifest, self.files, at_most=None)",
        ["tests/test_sizes.py"]),
    "codes of tables beyond one row group offered packing": (
        "udfs/passes/coding.py",
        "coded.sum() < 2 or table_rows > layout.ROW_GROUP_ROWS:",
        "coded.sum() < 2:",
        ["tests/test_packed_codes.py"]),
    "the number of basis columns not measured (the size model's pick kept)": (
        "udfs/passes/basis_size.py",
        "    return min(c for c, b in measured.items() if b <= (1.0 + EVEN) * least), measured",
        "    return first, measured",
        ["tests/test_basis_size.py"]),
    "row-difference chunks of SQL ignore where row files start": (
        "udfs/store/row_differences.py",
        '    return f"greatest({r} // {CHUNK_ROWS} * {CHUNK_ROWS}, {r} - {p})"',
        '    return f"({r} // {CHUNK_ROWS} * {CHUNK_ROWS})"',
        ["tests/test_row_differences.py"]),
    "python reads of row differences not widened to whole chunks": (
        "udfs/store/reader.py",
        "                groups = self._chunk_groups(first, local, starts)",
        "                groups = groups",
        ["tests/test_row_differences.py"]),
    "packed residual step read as the tolerance": (
        "udfs/store/table_schemas.py",
        '    step = np.where(nulls["residual_step"], 2.0 * tolerance, field["residual_step"])  # NaN: none',
        '    step = np.where(nulls["residual_step"], 1.0 * tolerance, field["residual_step"])  # NaN: none',
        ["tests/test_packed_columns.py"]),
    "SQL packed residual step read as the tolerance": (
        "udfs/sql/tables.py", '"residual_step": f"CASE WHEN {step} IS NULL THEN 2.0 * ({tol}) WHEN',
        '"residual_step": f"CASE WHEN {step} IS NULL THEN 1.0 * ({tol}) WHEN',
        ["tests/test_packed_columns.py"]),
    "stored SHA-256 read back wrong": (
        "udfs/store/manifest_schema.py", "            return raw.hex()\n",
        "            return raw.hex()[::-1]\n",
        ["tests/test_stored_forms.py"]),
    "SQL by-field columns table read as NULL": (
        "udfs/sql/tables.py", '        return quote_identifier(name) if name in stored else "CAST(NULL AS DOUBLE)"',
        '        return "CAST(NULL AS DOUBLE)"',
        ["tests/test_stored_forms.py"]),
    "column figures rounded down": (
        "udfs/store/arithmetic.py", "    return np.where((up >= values) & np.isfinite(up), up, values)",
        "    return np.where(np.isfinite(up), np.ldexp(np.floor(mantissa * scale) / scale, exponent), values)",
        ["tests/test_stored_forms.py"]),
    "packed residual codes unpacked one column off": (
        "udfs/store/packed_codes.py",
        "    columns = np.ascontiguousarray(flat[:, picked].T)  # one contiguous row per code column\n",
        "    columns = np.ascontiguousarray(np.roll(flat, 1, axis=1)[:, picked].T)\n",
        ["tests/test_packed_codes.py"]),
    "SQL unpacks packed residual codes one element off": (
        "udfs/store/packed_codes.py",
        '    items = [f"{packed}[{t + 1}] AS {quote_identifier(name)}" for t, name in enumerate(code_names)\n',
        '    items = [f"{packed}[{t + 2}] AS {quote_identifier(name)}" for t, name in enumerate(code_names)\n',
        ["tests/test_packed_codes.py"]),
}


def run(name: str) -> bool:
    """Apply mutation ``name``, run each of its test files; True when every file has a failure."""
    path, anchor, replacement, tests = MUTATIONS[name]
    source = ROOT / path
    text = source.read_text(encoding="utf-8")
    if text.count(anchor) != 1:
        print(f"{name}: the anchor is not (exactly once) in {path}; update it")
        return False
    source.write_text(text.replace(anchor, replacement), encoding="utf-8")
    caught = True
    try:
        for test in tests:
            out = subprocess.run([sys.executable, "-m", "pytest", "-q", "-x", "-p", "no:cacheprovider", test],
                                 cwd=ROOT, capture_output=True, text=True).stdout
            failed = [line.split(" - ")[0] for line in out.splitlines() if line.startswith("FAILED")]
            print(f"{name}: {test}: " + (f"caught by {failed[0][7:]}" if failed else "NOT CAUGHT"))
            caught &= bool(failed)
    finally:
        source.write_text(text, encoding="utf-8")
    return caught


def main(names: list[str]) -> int:
    unknown = [n for n in names if n not in MUTATIONS]
    if unknown:
        print(f"unknown mutations {unknown}; known: {list(MUTATIONS)}")
        return 2
    results = [run(name) for name in names or MUTATIONS]
    return 0 if all(results) else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
