"""Expected mutual information of many contingency tables at once, for AMI on bootstrap resamples.

Under the permutation model (Vinh, Epps & Bailey, 2010, JMLR 11; the formula scikit-learn
implements), the expected mutual information of a table with row sums a, column sums b
and total N is a sum over cells:

    EMI = sum_i sum_j f(a_i, b_j, N),
    f(a, b, N) = sum_{n} (n / N) log(N n / (a b)) P(n; a, b, N),

with P the hypergeometric probability of n shared items. So EMI depends only on the
margins, one cell at a time, and many tables can share one compiled loop.

scikit-learn computes every term of the support with three lgamma calls and one exp
(``expected_mutual_information``). Here P is computed once at the mode and carried
to its neighbours by the ratio P(n+1)/P(n) = (a-n)(b-n) / ((n+1)(N-a-b+n+1)), walking
outwards until P falls below TAIL. The hypergeometric distribution is log-concave, so
beyond that point every term is smaller still and the walk skips at most N of them:
the neglected mass is below N * TAIL * 2 log N, under 1e-20 for any corpus this tool
takes. The result equals scikit-learn's to rounding (the tests check 1e-12).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from scipy.special import gammaln

TAIL = 1e-30  # hypergeometric probability below which the walk stops (see the module docstring)
TABLES_PER_THREAD = 128  # below this many tables per thread, starting threads costs more than it saves


@lru_cache(maxsize=1)
def _kernel():
    """The compiled loop; numba is imported (and the loop compiled or loaded from its cache) on first use only."""
    import numba

    @numba.njit(cache=True, nogil=True)
    def expected_mi(rows, cols, totals, log_factorial, log_int, tail):  # pragma: no cover - compiled
        out = np.zeros(rows.shape[0])
        for t in range(rows.shape[0]):
            n = totals[t]
            log_n = log_int[n]
            emi = 0.0
            for i in range(rows.shape[1]):
                a = rows[t, i]
                if a == 0:
                    continue
                for j in range(cols.shape[1]):
                    b = cols[t, j]
                    if b == 0:
                        continue
                    low = max(1, a + b - n)
                    high = min(a, b)
                    if low > high:
                        continue
                    mode = min(max((a + 1) * (b + 1) // (n + 2), low), high)
                    shift = log_n - log_int[a] - log_int[b]  # log(N n / (a b)) = shift + log n
                    p_mode = np.exp(log_factorial[a] + log_factorial[b] + log_factorial[n - a] + log_factorial[n - b]
                                    - log_factorial[n] - log_factorial[mode] - log_factorial[a - mode]
                                    - log_factorial[b - mode] - log_factorial[n - a - b + mode])
                    cell = mode / n * (shift + log_int[mode]) * p_mode
                    p = p_mode
                    for k in range(mode, high):  # upwards: k -> k + 1
                        p *= (a - k) * (b - k) / ((k + 1.0) * (n - a - b + k + 1.0))
                        cell += (k + 1.0) / n * (shift + log_int[k + 1]) * p
                        if p < tail:
                            break
                    p = p_mode
                    for k in range(mode, low, -1):  # downwards: k -> k - 1
                        p *= k * (n - a - b + k) / ((a - k + 1.0) * (b - k + 1.0))
                        cell += (k - 1.0) / n * (shift + log_int[k - 1]) * p
                        if p < tail:
                            break
                    emi += cell
            out[t] = emi
        return out

    return expected_mi


@lru_cache(maxsize=4)
def _log_tables(largest: int) -> tuple[np.ndarray, np.ndarray]:
    """log k! and log k for k = 0 .. largest (log 0 is set to 0; it is never used)."""
    k = np.arange(largest + 1, dtype=np.float64)
    log_int = np.log(np.where(k == 0, 1.0, k))
    return gammaln(k + 1.0), log_int


def expected_mutual_info(row_sums: np.ndarray, col_sums: np.ndarray) -> np.ndarray:
    """EMI (natural log) of each table given by its margins: ``row_sums`` (T, R) and ``col_sums`` (T, C), integers.

    Zero margins (empty rows or columns) contribute nothing. Each table's total is its row sum.
    """
    rows = np.ascontiguousarray(row_sums, dtype=np.int64)
    cols = np.ascontiguousarray(col_sums, dtype=np.int64)
    if rows.ndim != 2 or cols.ndim != 2 or rows.shape[0] != cols.shape[0]:
        raise ValueError(f"The 'row_sums' and 'col_sums' parameters must be 2-D with one row per table. "
                         f"Got shapes {rows.shape} and {cols.shape} instead.")
    totals = rows.sum(axis=1)
    if not np.array_equal(totals, cols.sum(axis=1)):
        raise ValueError("The 'row_sums' and 'col_sums' parameters must have the same total per table.")
    if rows.shape[0] == 0:
        return np.zeros(0)
    log_factorial, log_int = _log_tables(int(max(totals.max(), 1)))
    kernel = _kernel()
    workers = min(_cores(), rows.shape[0] // TABLES_PER_THREAD)
    if workers < 2:
        return kernel(rows, cols, totals, log_factorial, log_int, TAIL)
    # The compiled loop releases the GIL (nogil): contiguous slices of tables run on threads side by side. Each
    # table's value comes from its own margins only, so the split cannot change a value (tests/test_evidence.py).
    from concurrent.futures import ThreadPoolExecutor

    bounds = np.linspace(0, rows.shape[0], workers + 1).astype(int)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        parts = [pool.submit(kernel, rows[a:b], cols[a:b], totals[a:b], log_factorial, log_int, TAIL)
                 for a, b in zip(bounds[:-1], bounds[1:])]
        return np.concatenate([part.result() for part in parts])


def _cores() -> int:
    """The cores this process may run on (its affinity where the system says, else the machine's count)."""
    import os

    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1
