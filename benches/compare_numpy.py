#!/usr/bin/env python3
"""Keelson's fit against a vectorised numpy implementation, same inputs, same run.

The numpy side is a fair, competent implementation of the same computation
(SPEC sections 2-8): demarketing and moments with BLAS matrix products, one
`numpy.linalg.eigh` per window and per fold, the whole (K, kappa) grid of the
diagonal ridge scored at once with broadcasting and one matrix product per
fold, weights, normalisation and the diagnostics the Rust fit also computes
(risk contributions, condition number). It is not the reference
implementation of tests/reference, which favours clarity over speed.

A fair reference: OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE, which this
machine's environment sets and which slow a current numpy, are removed for
this process (it re-executes itself without them before numpy loads); the
BLAS, its kernel and its thread count are printed (threadpoolctl); and numpy
gets the same number of threads as Keelson (--threads, default every core).

Usage:
    python benches/compare_numpy.py [--reps 21] [--threads N] [--sizes 50x120,250x120,...]
Builds `cargo build --release --example fit_timing` first if needed.
"""

import os
import sys

_SLOW_ENV = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")
if any(k in os.environ for k in _SLOW_ENV):
    os.execve(sys.executable, [sys.executable] + sys.argv, {k: v for k, v in os.environ.items() if k not in _SLOW_ENV})

import argparse  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402
from threadpoolctl import threadpool_info, threadpool_limits  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def panel(seed, T, N):
    rng = np.random.default_rng(seed)
    m = 0.006 + 0.045 * rng.standard_normal(T)
    loud = 0.03 * rng.standard_normal((T, 4)) @ (0.8 * rng.standard_normal((4, N)))
    quiet = (0.004 + 0.007 * rng.standard_normal((T, 2))) @ np.where(np.arange(N) % 3 == 0, 0.75, 0.0)[None, :].repeat(2, 0)
    R = loud + quiet + np.outer(m, 0.3 * rng.standard_normal(N)) + 0.01 * rng.standard_normal((T, N))
    return R, m


def write_csv(path, R, m):
    T, N = R.shape
    with open(path, "w") as f:
        f.write("period,MKT," + ",".join(f"f{j}" for j in range(N)) + "\n")
        for t in range(T):
            f.write("%04d-%02d," % (1900 + t // 12, t % 12 + 1) + repr(float(m[t])) + "," +
                    ",".join(repr(float(v)) for v in R[t]) + "\n")


def moments(R, m):
    mc = m - m.mean()
    Rc = R - R.mean(0)
    beta = Rc.T @ mc / (mc @ mc)
    X = Rc - np.outer(mc, beta)               # centred demarketed returns
    mu = R.mean(0) - beta * m.mean()
    return beta, X, mu


def basis(X, mu, kmax):
    T = X.shape[0]
    sd = np.sqrt((X * X).sum(0) / (T - 1))
    s = mu / sd ** 2                            # Sharpe scaling
    Y = X * (s / math.sqrt(T - 1))
    if Y.shape[1] > T:
        lam, U = np.linalg.eigh(Y @ Y.T)
        lam, U = lam[::-1][:kmax], U[:, ::-1][:, :kmax]
        V = (Y.T @ U) / np.sqrt(np.maximum(lam, 1e-300))
    else:
        lam, V = np.linalg.eigh(Y.T @ Y)
        lam, V = lam[::-1][:kmax], V[:, ::-1][:, :kmax]
    Q = s[:, None] * V
    d = mu @ Q
    Q *= np.where(d < 0, -1.0, 1.0)
    return Q, np.maximum(lam, 0.0), np.abs(d), (Y * Y).sum()


def fit(R, m, ks, kappas, P=12, folds=3, target=0.10):
    T, N = R.shape
    kmax = max(ks)
    beta, X, mu = moments(R, m)
    Q, lam, muF, _ = basis(X, mu, kmax)
    kp2 = (np.asarray(kappas) / math.sqrt(P)) ** 2
    ks = np.asarray(ks)
    scores = np.zeros((len(ks), len(kappas)))
    for idx in (np.array_split(np.arange(T), folds) if folds else []):
        train = np.setdiff1d(np.arange(T), idx)
        bf, Xf, muf = moments(R[train], m[train])
        Qf, lamf, muFf, _ = basis(Xf, muf, kmax)
        F2 = (R[idx] - np.outer(m[idx], bf)) @ Qf          # held-out component returns
        trace = np.cumsum(lamf)[ks - 1]                      # tr(Sigma_F) for each K
        gamma = trace[:, None] / (kp2[None, :] * len(train))  # (nK, nkappa)
        B = muFf[None, None, :] / (lamf[None, None, :] + gamma[:, :, None])
        B *= (np.arange(kmax)[None, None, :] < ks[:, None, None])  # first K components only
        Pt = F2 @ B.reshape(-1, kmax).T                      # every grid point at once
        sr = Pt.mean(0) / Pt.std(0, ddof=1) * math.sqrt(P)
        scores += sr.reshape(len(ks), len(kappas)) / folds
    i = int(np.nanargmax(scores)) if folds else 0
    K, kappa = ks[i // len(kappas)], kappas[i % len(kappas)]
    gamma = lam[:K].sum() / ((kappa / math.sqrt(P)) ** 2 * T)
    w = Q[:, :K] @ (muF[:K] / (lam[:K] + gamma))
    xw = X @ w
    var = xw @ xw / (T - 1)
    c = target / math.sqrt(P * var)
    w = c * w
    sw = X.T @ (X @ w) / (T - 1)
    rc = w * sw / (w @ sw)
    if T > N:
        ev = np.linalg.eigvalsh(X.T @ X)       # the same route as the Rust fit
        cond = ev[-1] / ev[0] if ev[0] > ev[-1] * N * np.finfo(float).eps else math.inf
    else:
        cond = math.inf
    return w, -c * (beta @ (w / c)), rc, cond


def time_it(f, reps):
    f()
    out = []
    for _ in range(reps):
        s = time.perf_counter()
        f()
        out.append(time.perf_counter() - s)
    return float(np.median(out))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--reps", type=int, default=21)
    ap.add_argument("--sizes", default="25x120,50x120,100x120,250x120,1000x120,2000x120,50x600,250x600,1000x600,2000x600")
    ap.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--backtest", default="", metavar="NxT",
                    help="also time a rolling backtest (120-period window, monthly refits, CV components method) "
                         "on an N x T panel, Keelson against the same loop in numpy")
    args = ap.parse_args()
    threadpool_limits(args.threads)
    for pool in threadpool_info():
        print(f"numpy BLAS: {pool.get('internal_api')} {pool.get('version')}, kernel {pool.get('architecture')}, "
              f"{pool.get('num_threads')} thread(s) ({pool.get('filepath')})")
    print(f"environment: OPENBLAS_CORETYPE={os.environ.get('OPENBLAS_CORETYPE')}, "
          f"OPENBLAS_L2_SIZE={os.environ.get('OPENBLAS_L2_SIZE')}; Keelson threads {args.threads}")
    sizes = [tuple(int(v) for v in s.split("x")) for s in args.sizes.split(",")]
    binary = os.path.join(ROOT, "target", "release", "examples", "fit_timing")
    subprocess.run(["cargo", "build", "--release", "--quiet", "--example", "fit_timing"], cwd=ROOT, check=True)
    tmp = tempfile.mkdtemp(prefix="keelson-cmp-")
    files, panels = [], []
    for n, t in sizes:
        R, m = panel(n * 7 + t, t, n)
        path = os.path.join(tmp, f"p{n}x{t}.csv")
        write_csv(path, R, m)
        files.append(path)
        panels.append((R, m))
    out = subprocess.run([binary, str(args.reps), str(args.threads)] + files, check=True, capture_output=True,
                         text=True).stdout
    rust = [json.loads(line) for line in out.splitlines()]
    kappas = list(np.logspace(-2, 1, 40))
    print(f"numpy {np.__version__}; one 50x50 eigensolve in faer: {rust[0]['eigensolve_s'] * 1e6:.0f} us")
    print("fixed: K = 5, kappa = 1 with the held-out check (3 folds); bare: the same without the folds")
    print(f"{'N x T':>10} {'fixed rust':>11} {'numpy':>9} {'ratio':>6} {'bare rust':>10} {'numpy':>9} {'ratio':>6}"
          f" {'cv rust':>9} {'numpy':>9} {'ratio':>6}")
    for (n, t), (R, m), r in zip(sizes, panels, rust):
        T_train = t - math.ceil(t / 3)
        kmax = min(n, 30, T_train - 2)
        fixed = time_it(lambda: fit(R, m, [5], [1.0]), args.reps)
        bare = time_it(lambda: fit(R, m, [5], [1.0], folds=0), args.reps)
        cv = time_it(lambda: fit(R, m, list(range(1, kmax + 1)), kappas), args.reps)
        print(f"{n:>5} x{t:>4} {r['fixed_s'] * 1e3:>9.2f}ms {fixed * 1e3:>7.2f}ms {fixed / r['fixed_s']:>5.1f}x "
              f"{r['bare_s'] * 1e3:>8.2f}ms {bare * 1e3:>7.2f}ms {bare / r['bare_s']:>5.1f}x "
              f"{r['cv_s'] * 1e3:>7.2f}ms {cv * 1e3:>7.2f}ms {cv / r['cv_s']:>5.1f}x")
    if args.backtest:
        n, t = (int(v) for v in args.backtest.split("x"))
        R, m = panel(n * 7 + t, t, n)
        path = os.path.join(tmp, f"bt{n}x{t}.csv")
        write_csv(path, R, m)
        r = json.loads(subprocess.run([binary, "backtest", "120", str(args.threads), path], check=True,
                                      capture_output=True, text=True).stdout)
        T_train = 120 - math.ceil(120 / 3)
        kmax = min(n, 30, T_train - 2)
        kappas = list(np.logspace(-2, 1, 40))

        def loop():
            out = []
            for t0 in range(120, t):
                w, wm, _, _ = fit(R[t0 - 120:t0], m[t0 - 120:t0], list(range(1, kmax + 1)), kappas)
                out.append(float(w @ R[t0] + wm * m[t0]))
            return out

        s = time.perf_counter()
        loop()
        numpy_s = time.perf_counter() - s
        print(f"rolling backtest {n} x {t}, 120-period window, {r['refits']} monthly CV refits: "
              f"Keelson {r['backtest_s']:.2f} s ({args.threads} threads over dates), numpy {numpy_s:.2f} s "
              f"(the same loop, {args.threads} BLAS threads): ratio {numpy_s / r['backtest_s']:.2f}x")
    return 0


if __name__ == "__main__":
    sys.exit(main())
