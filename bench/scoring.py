"""Side-by-side benchmark: fleetsift's exact Riemannian pairwise distances and kNN against pyriemann 0.12.

    python bench/scoring.py            # 2,000 and 5,000 random 14x14 SPD matrices (a few minutes)
    python bench/scoring.py --quick    # 300 and 1,000 matrices (seconds)

Everything is measured in this one run on the same matrices. Matrices come from
``pyriemann.datasets.make_matrices(n, 14, "spd")`` (random eigenvectors, eigenvalues uniform in [0.5, 2]: the
generator of pyriemann's own tests); ``--wide`` adds a harder set with log-uniform eigenvalues in [1e-2, 1e2],
where the log-Euclidean lower bound is looser. The kNN is leave-one-out (k nearest other matrices). For sizes
above ``--full-max`` the all-pairs computations (pyriemann's, and fleetsift's exact pairwise) run on a random
subset of query rows against all matrices and are scaled linearly by the number of pairs a full symmetric
computation needs; the output says where this was done. fleetsift's kNN always runs in full.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
import warnings

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from fleetsift.scoring import geometry  # noqa: E402
from fleetsift.scoring.index import knn  # noqa: E402

warnings.filterwarnings("ignore", category=DeprecationWarning)


def timed(f, *a, **kw):
    t0 = time.perf_counter()
    out = f(*a, **kw)
    return out, time.perf_counter() - t0


def make(n, d, kind, seed):
    if kind == "pyriemann":
        from pyriemann.datasets import make_matrices
        return make_matrices(n, d, "spd", rs=seed)
    rng = np.random.default_rng(seed)
    Q = np.linalg.qr(rng.standard_normal((n, d, d)))[0]
    w = np.exp(rng.uniform(np.log(1e-2), np.log(1e2), (n, d)))
    return (Q * w[:, None, :]) @ Q.transpose(0, 2, 1)


def bench_one(n, d, k, kind, seed, full_max, subset, pr_pairwise):
    X = make(n, d, kind, seed)
    rng = np.random.default_rng(seed + 1)
    full = n <= full_max
    rows = np.arange(n) if full else np.sort(rng.choice(n, size=min(subset, n), replace=False))
    # pyriemann's symmetric call computes row i against rows i..n-1: n(n+1)/2 pairs; ours n(n-1)/2.
    pr_full_pairs, fs_full_pairs = n * (n + 1) / 2, n * (n - 1) / 2
    sub_pairs = len(rows) * n

    print(f"\n== n={n} {d}x{d} SPD ({kind}), k={k} leave-one-out" +
          ("" if full else f"; all-pairs timed on {len(rows)} random rows x {n} and scaled by pair count"))

    # pyriemann: pairwise, then kNN by argsort of each row (self excluded).
    if full:
        Dp, t_pr = timed(pr_pairwise, X, None, "riemann")
    else:
        Dp, t_sub = timed(pr_pairwise, X[rows], X, "riemann")
        t_pr = t_sub * pr_full_pairs / sub_pairs
    Dp = np.array(Dp)
    Dp[np.arange(len(rows)), rows] = np.inf

    def argsort_knn(D):
        idx = np.argsort(D, axis=1, kind="stable")[:, :k]
        return np.take_along_axis(D, idx, 1), idx

    (pd_, pi_), t_sort = timed(argsort_knn, Dp)
    if not full:
        t_sort *= n / len(rows)
    t_pr_knn = t_pr + t_sort

    # fleetsift exact pairwise (same subset rule) and exact kNN (always all n queries).
    if full:
        Df, t_fs_pw = timed(geometry.pairwise_distance, X, None, "riemann")
        Df = Df[rows]
    else:
        Df, t_sub = timed(geometry.pairwise_distance, X[rows], X, "riemann")
        t_fs_pw = t_sub * fs_full_pairs / sub_pairs
    ex = np.eye(n, dtype=bool)
    (fd, fi), t_fs_knn = timed(knn, X, X, k, "riemann", ex)

    Dp_chk = Dp.copy()
    Dp_chk[np.arange(len(rows)), rows] = 0.0
    pw_diff = float(np.max(np.abs(Df - Dp_chk)))
    knn_diff = float(np.max(np.abs(fd[rows] - pd_)))
    same_idx = float(np.mean(fi[rows] == pi_))

    print(f"pyriemann  pairwise {t_pr:8.2f} s{'' if full else ' (scaled)'}   + argsort kNN {t_sort:6.2f} s"
          f"  = kNN {t_pr_knn:8.2f} s")
    print(f"fleetsift  pairwise {t_fs_pw:8.2f} s{'' if full else ' (scaled)'}   exact kNN {t_fs_knn:8.2f} s")
    print(f"ratio      pairwise {t_pr / t_fs_pw:6.2f}x   kNN {t_pr_knn / t_fs_knn:6.1f}x  (pyriemann time / fleetsift)")
    print(f"max |diff| pairwise {pw_diff:.2e}   kNN distances {knn_diff:.2e}   same neighbour indices "
          f"{100 * same_idx:.2f}%  (on {len(rows)} rows)")

    # Log-Euclidean throughput (exact pairwise and kNN, all n).
    _, t_le_pw = timed(geometry.pairwise_distance, X, None, "logeuclid")
    _, t_le_knn = timed(knn, X, X, k, "logeuclid", ex)
    print(f"logeuclid  pairwise {t_le_pw:6.2f} s ({fs_full_pairs / t_le_pw / 1e6:.1f} M pairs/s)   "
          f"kNN {t_le_knn:6.2f} s ({n / t_le_knn:.0f} queries/s)")
    return dict(n=n, kind=kind, t_pr_knn=t_pr_knn, t_fs_knn=t_fs_knn, knn_diff=knn_diff, pw_diff=pw_diff)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes (300 and 1,000 matrices)")
    ap.add_argument("--sizes", type=int, nargs="*", help="override the matrix counts")
    ap.add_argument("--dim", type=int, default=14)
    ap.add_argument("--k", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--full-max", type=int, default=2000, help="largest n timed over all pairs")
    ap.add_argument("--subset", type=int, default=400, help="query rows timed above --full-max")
    ap.add_argument("--wide", action="store_true", help="also run the wide-spectrum set at the first size")
    a = ap.parse_args(argv)
    try:
        from pyriemann.geometry.distance import pairwise_distance as pr_pairwise
        import pyriemann
    except ImportError:
        sys.exit("bench/scoring.py needs the test extra (pyriemann==0.12): pip install -e '.[test]'")
    sizes = a.sizes or ([300, 1000] if a.quick else [2000, 5000])
    try:
        from threadpoolctl import threadpool_info
        threads = ", ".join(f"{i['internal_api']}:{i['num_threads']}" for i in threadpool_info())
    except ImportError:
        threads = "unknown"
    print(f"fleetsift SPD scoring bench: pyriemann {pyriemann.__version__}, numpy {np.__version__}, "
          f"BLAS threads {threads}, {os.cpu_count()} CPUs (shared machine: timings vary between runs)")
    res = [bench_one(n, a.dim, a.k, "pyriemann", a.seed, a.full_max, a.subset, pr_pairwise) for n in sizes]
    if a.wide:
        res.append(bench_one(sizes[0], a.dim, a.k, "wide", a.seed, a.full_max, a.subset, pr_pairwise))
    print("\nsummary: kNN speed-up " + ", ".join(f"n={r['n']} {r['kind']}: {r['t_pr_knn'] / r['t_fs_knn']:.1f}x"
                                                for r in res)
          + f"; largest |diff| {max(max(r['knn_diff'], r['pw_diff']) for r in res):.1e}")


if __name__ == "__main__":
    main()
