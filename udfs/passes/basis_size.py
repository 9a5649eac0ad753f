"""How many basis columns an archive under a tolerance keeps, by measured trial.

The size model (``targets.plan_for_tolerance``) predicts each column's residual as Gaussian
and its codes' bytes from their entropy. On real tables that can be far off: on a table of NIR
spectra (215 x 100) at 0.01 of each column's std it predicted 17.7 kB for one basis column,
whose archive took 54.1 kB, while 16 basis columns wrote 34.9 kB (measured before residual
codes could be packed into one list column). So, like the predictor of
each column (``predictors``), the number of basis columns is measured: each size tried is
fitted from the sketch, its residual codes on the profile pass's sample of runs of rows are
written with the real Parquet writer (``predictors.choose_predictors``), and the bytes are
scaled to the table, with the weights, anchor rows and exactly stored cells it adds.

The sizes tried climb from the model's pick: doubling while the measured bytes fall, else
halving while they fall (a few trials, not one per size); no basis at all is always measured
too (every column rounded alone: the trial of any size has measured those columns already).
Only the bytes are chosen here; the encode pass measures every bound of whatever is written.

References: column subset selection by pivoted QR, whose orders are nested (c columns are
the first c of the order): P. Businger, G. H. Golub, "Linear least squares solutions by
Householder transformations", Numer. Math. 7 (1965).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["climb", "EVEN", "SEARCH_CELLS", "search_sample"]

#: Sizes measuring within this fraction of the least bytes count as even, and the fewest basis
#: columns among them are kept: a sample's estimate is no closer than that to the archive
#: written (the ridership panel of ``benchmarks/real_tables.py`` at 0.01 std: 23 and 24 basis
#: columns estimated 4% apart wrote archives 0.3% apart), and each basis column adds a little
#: the estimate does not count (its entries in the columns table).
EVEN = 0.01


def climb(first: int, limit: int, measure: Callable[[int], float]) -> tuple[int, dict[int, float]]:
    """The basis size in 0 .. ``limit`` with the fewest ``measure(c)`` bytes found by climbing
    from ``first``: up by doubling (0 -> 1 -> 2 -> 4 ...) while each size measures smaller than
    the best so far, then, when going up found nothing smaller, down by halving the same way;
    size 0 (no basis) is measured in any case. Returns (the fewest basis columns measuring
    within ``EVEN`` of the least bytes, every size measured -> its bytes). ``measure`` is called
    once per size."""
    first = int(min(max(first, 0), limit))
    measured = {first: float(measure(first))}
    best = first

    def step(c: int, up: bool) -> int:
        if up:
            return min(limit, max(1, 2 * c))
        return c // 2 if c > 1 else 0

    for up in (True, False):
        c = best
        while True:
            nxt = step(c, up)
            if nxt == c or nxt in measured:
                break
            measured[nxt] = float(measure(nxt))
            if measured[nxt] >= measured[best]:
                break
            best = c = nxt
        if best != first:
            break
    if 0 not in measured:
        measured[0] = float(measure(0))
    least = min(measured.values())
    return min(c for c, b in measured.items() if b <= (1.0 + EVEN) * least), measured


#: Cells of the sample the climb measures at most (512 kB of float64): every k-th run of the
#: trial's sample, k as small as keeps within it. Each size tried costs a trial of the real
#: writer on these cells; the size chosen is then tried on the whole sample as before.
SEARCH_CELLS = 1 << 16


def search_sample(sample: np.ndarray, run_starts: np.ndarray | None) -> np.ndarray:
    """Every k-th run of ``sample`` (m, n) (runs start at ``run_starts`` (r,)), k the smallest
    that keeps at most ``SEARCH_CELLS`` cells, or one run; the runs of the trial's sample are a
    uniform sample of runs, and so is every k-th of them."""
    m, n = sample.shape
    if m * n <= SEARCH_CELLS or run_starts is None or run_starts.size < 2:
        return sample
    k = int(np.ceil(m * n / SEARCH_CELLS))
    bounds = np.append(run_starts, m)
    kept = [sample[bounds[r]:bounds[r + 1]] for r in range(0, run_starts.size, k)]
    return np.vstack(kept)
