//! Thin wrappers over faer's low-level kernels. Small kernels always run
//! sequentially (`Par::Seq`): every fit up to a few hundred factors is
//! bitwise reproducible whatever the thread count, and parallelism goes
//! across independent tasks (folds, backtest dates, bootstrap draws). A
//! kernel of at least [`PARALLEL_FLOPS`] inside a fit that was given more
//! than one thread (its [`Kernels`], passed to every kernel) uses faer's rayon parallelism instead:
//! its reductions may then be split differently, so such results may differ
//! from the sequential ones in the last bits (tested to 1e-12 relative).

use faer::diag::Diag;
use faer::dyn_stack::{MemBuffer, MemStack, StackReq};
use faer::linalg::evd::{self, ComputeEigenvectors};
use faer::linalg::matmul::matmul;
use faer::linalg::svd::{self, ComputeSvdVectors};
use faer::{Accum, Mat, MatRef, Par};

use super::error::EstimateError;

/// Work (multiply–adds) from which a kernel runs in parallel when the fit
/// has threads to spare: about a 120 × 120 × 300 product, or a 160 × 160
/// eigendecomposition. Below it, splitting costs more than it saves.
pub const PARALLEL_FLOPS: f64 = 4.0e6;

/// The parallelism a fit's kernels may use, passed explicitly to every
/// kernel: a fit given `threads` makes one ([`Kernels::with_threads`]) and
/// hands it down with its moments; work on a worker thread of a fan-out
/// (folds, draws, refit dates) runs [`Kernels::SEQUENTIAL`].
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) struct Kernels {
    threads: usize,
}

impl Kernels {
    /// One thread: every kernel sequential.
    pub(crate) const SEQUENTIAL: Kernels = Kernels { threads: 1 };

    /// Up to `threads` threads (at least one).
    pub(crate) fn with_threads(threads: usize) -> Kernels {
        Kernels { threads: threads.max(1) }
    }

    /// Threads these kernels may use.
    pub(crate) fn threads(self) -> usize {
        self.threads
    }

    /// The parallelism of a kernel of `flops` multiply–adds.
    fn par(self, flops: f64) -> Par {
        if self.threads > 1 && flops >= PARALLEL_FLOPS { Par::rayon(self.threads) } else { Par::Seq }
    }

    /// Runs `f` on each of `parts` in parallel over these threads when the
    /// work (`flops`) is at least [`PARALLEL_FLOPS`], else in turn; results
    /// in the order of `parts`. For column-wise work whose parts are
    /// independent, so the results are the same whatever the split.
    pub(crate) fn for_parts<P: Send, R: Send>(self, parts: Vec<P>, flops: f64, f: impl Fn(P) -> R + Sync) -> Vec<R> {
        if self.threads <= 1 || parts.len() <= 1 || flops < PARALLEL_FLOPS {
            return parts.into_iter().map(f).collect();
        }
        let workers = parts.len();
        super::fanout::map_in_order(parts, workers, f).unwrap_or_else(|p| std::panic::resume_unwind(p.0))
    }
}

/// Scratch memory for faer's eigendecompositions, sized for the largest
/// request seen and reused: a fit's bases (the whole window's and every
/// fold's) decompose one after the other in one workspace instead of
/// allocating scratch for each.
#[derive(Default)]
pub(crate) struct Workspace {
    req: Option<StackReq>,
    buf: Option<MemBuffer>,
}

impl Workspace {
    /// A stack of at least `req`, growing the buffer only when `req` does
    /// not fit the one held.
    fn stack(&mut self, req: StackReq) -> &mut MemStack {
        let fits = self
            .req
            .is_some_and(|held| held.size_bytes() >= req.size_bytes() && held.align_bytes() >= req.align_bytes());
        if !fits || self.buf.is_none() {
            let grown = self.req.map_or(req, |held| held.or(req));
            self.req = Some(grown);
            self.buf = Some(MemBuffer::new(grown));
        }
        MemStack::new(self.buf.as_mut().expect("a buffer was just made"))
    }

    /// Bytes held (for the test of reuse).
    #[cfg(test)]
    fn held_bytes(&self) -> usize {
        self.req.map_or(0, |r| r.size_bytes())
    }
}

/// The parallelism of a product of an m × k by a k × n matrix.
fn par_mul(kernels: Kernels, m: usize, k: usize, n: usize) -> Par {
    kernels.par(m as f64 * k as f64 * n as f64)
}

/// The parallelism of an n × n symmetric decomposition (≈ n³ work).
fn par_decomp(kernels: Kernels, n: usize) -> Par {
    kernels.par((n as f64).powi(3))
}

/// A'A.
pub(crate) fn gram_tn(kernels: Kernels, a: MatRef<'_, f64>) -> Mat<f64> {
    let mut out = Mat::zeros(a.ncols(), a.ncols());
    let par = par_mul(kernels, a.ncols(), a.nrows(), a.ncols());
    matmul(out.as_mut(), Accum::Replace, a.transpose(), a, 1.0, par);
    out
}

/// AA'.
pub(crate) fn gram_nt(kernels: Kernels, a: MatRef<'_, f64>) -> Mat<f64> {
    let mut out = Mat::zeros(a.nrows(), a.nrows());
    let par = par_mul(kernels, a.nrows(), a.ncols(), a.nrows());
    matmul(out.as_mut(), Accum::Replace, a, a.transpose(), 1.0, par);
    out
}

/// A B.
pub(crate) fn mul(kernels: Kernels, a: MatRef<'_, f64>, b: MatRef<'_, f64>) -> Mat<f64> {
    let mut out = Mat::zeros(a.nrows(), b.ncols());
    let par = par_mul(kernels, a.nrows(), a.ncols(), b.ncols());
    matmul(out.as_mut(), Accum::Replace, a, b, 1.0, par);
    out
}

/// A' B.
pub(crate) fn mul_tn(kernels: Kernels, a: MatRef<'_, f64>, b: MatRef<'_, f64>) -> Mat<f64> {
    let mut out = Mat::zeros(a.ncols(), b.ncols());
    let par = par_mul(kernels, a.ncols(), a.nrows(), b.ncols());
    matmul(out.as_mut(), Accum::Replace, a.transpose(), b, 1.0, par);
    out
}

/// Symmetric eigendecomposition (lower triangle read), eigenvalues in
/// descending order with ties kept in solver order (a stable sort), and the
/// matching unit eigenvectors as columns.
pub(crate) fn sym_eigen_desc(
    kernels: Kernels,
    ws: &mut Workspace,
    a: MatRef<'_, f64>,
    stage: &'static str,
) -> Result<(Vec<f64>, Mat<f64>), EstimateError> {
    let n = a.nrows();
    let mut s = Diag::<f64>::zeros(n);
    let mut u = Mat::<f64>::zeros(n, n);
    let par = par_decomp(kernels, n);
    let req = evd::self_adjoint_evd_scratch::<f64>(n, ComputeEigenvectors::Yes, par, Default::default());
    evd::self_adjoint_evd(a, s.as_mut(), Some(u.as_mut()), par, ws.stack(req), Default::default())
        .map_err(|e| EstimateError::Numerical { stage, detail: format!("{e:?}") })?;
    let vals: Vec<f64> = (0..n).map(|i| s[i]).collect();
    check_finite(&vals, stage)?;
    let order = descending_order(&vals);
    let sorted_vals = order.iter().map(|&i| vals[i]).collect();
    let sorted_vecs = Mat::from_fn(n, n, |r, c| u[(r, order[c])]);
    Ok((sorted_vals, sorted_vecs))
}

/// Largest and smallest eigenvalue of a symmetric matrix (lower triangle
/// read): Householder tridiagonalisation, then Sturm-sequence bisection for
/// the two ends of the spectrum only (Golub & Van Loan, §8.4.1). Both are
/// accurate to about ε·‖A‖ in absolute terms, like a full eigensolve, at a
/// fraction of its cost when only the condition number is wanted.
pub(crate) fn sym_extreme_eigenvalues(
    kernels: Kernels,
    a: MatRef<'_, f64>,
    stage: &'static str,
) -> Result<(f64, f64), EstimateError> {
    let n = a.nrows();
    if n == 0 {
        return Err(EstimateError::Numerical { stage, detail: "empty matrix".into() });
    }
    let mut t = Mat::<f64>::zeros(n, n);
    t.copy_from_triangular_lower(a);
    if n > 1 {
        let bs = faer::linalg::qr::no_pivoting::factor::recommended_block_size::<f64>(n, n);
        let mut householder = Mat::<f64>::zeros(bs, n - 1);
        let par = par_decomp(kernels, n);
        let req = evd::tridiag::tridiag_in_place_scratch::<f64>(n, par, Default::default());
        let mut buf = MemBuffer::new(req);
        evd::tridiag::tridiag_in_place(
            t.as_mut(),
            householder.as_mut(),
            par,
            MemStack::new(&mut buf),
            Default::default(),
        );
    }
    let d: Vec<f64> = (0..n).map(|i| t[(i, i)]).collect();
    let e2: Vec<f64> = (0..n.saturating_sub(1)).map(|i| t[(i + 1, i)] * t[(i + 1, i)]).collect();
    check_finite(&d, stage)?;
    check_finite(&e2, stage)?;
    // Gershgorin bounds on the spectrum.
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for i in 0..n {
        let r = if i > 0 { e2[i - 1].sqrt() } else { 0.0 } + if i + 1 < n { e2[i].sqrt() } else { 0.0 };
        lo = lo.min(d[i] - r);
        hi = hi.max(d[i] + r);
    }
    let norm = lo.abs().max(hi.abs());
    let pivmin = f64::MIN_POSITIVE.max(norm * norm * f64::EPSILON * f64::EPSILON);
    // Number of eigenvalues strictly below x (the LDLᵀ inertia of T − xI).
    let below = |x: f64| -> usize {
        let mut count = 0;
        let mut q = d[0] - x;
        for i in 0..n {
            if i > 0 {
                q = d[i] - x - e2[i - 1] / q;
            }
            if q.abs() < pivmin {
                q = -pivmin;
            }
            if q < 0.0 {
                count += 1;
            }
        }
        count
    };
    // The j-th smallest eigenvalue (0-based) by bisection of [lo, hi].
    let nth = |j: usize| -> f64 {
        let (mut a, mut b) = (lo - pivmin, hi + pivmin);
        for _ in 0..256 {
            let mid = 0.5 * (a + b);
            if mid <= a || mid >= b || b - a <= 2.0 * f64::EPSILON * a.abs().max(b.abs()) {
                break;
            }
            if below(mid) > j { b = mid } else { a = mid }
        }
        0.5 * (a + b)
    };
    Ok((nth(n - 1), nth(0)))
}

/// Singular values (descending), U and V of a thin SVD.
pub(crate) type Svd = (Vec<f64>, Mat<f64>, Mat<f64>);

/// Thin SVD A = U diag(s) V', singular values descending.
pub(crate) fn thin_svd(kernels: Kernels, a: MatRef<'_, f64>, stage: &'static str) -> Result<Svd, EstimateError> {
    let (m, n) = a.shape();
    let k = m.min(n);
    let mut s = Diag::<f64>::zeros(k);
    let mut u = Mat::<f64>::zeros(m, k);
    let mut v = Mat::<f64>::zeros(n, k);
    let par = par_decomp(kernels, k);
    let req = svd::svd_scratch::<f64>(m, n, ComputeSvdVectors::Thin, ComputeSvdVectors::Thin, par, Default::default());
    let mut buf = MemBuffer::new(req);
    svd::svd(a, s.as_mut(), Some(u.as_mut()), Some(v.as_mut()), par, MemStack::new(&mut buf), Default::default())
        .map_err(|e| EstimateError::Numerical { stage, detail: format!("{e:?}") })?;
    let vals: Vec<f64> = (0..k).map(|i| s[i]).collect();
    check_finite(&vals, stage)?;
    Ok((vals, u, v))
}

fn check_finite(vals: &[f64], stage: &'static str) -> Result<(), EstimateError> {
    if vals.iter().all(|v| v.is_finite()) {
        Ok(())
    } else {
        Err(EstimateError::Numerical { stage, detail: "non-finite eigenvalue or singular value".into() })
    }
}

fn descending_order(vals: &[f64]) -> Vec<usize> {
    // faer returns ascending values; walk from the top so that equal values
    // keep the solver's order, then stable-sort (ties broken by index).
    let mut order: Vec<usize> = (0..vals.len()).rev().collect();
    order.sort_by(|&a, &b| vals[b].total_cmp(&vals[a]));
    order
}

/// Cholesky solve of a small symmetric positive definite system, in place.
/// Returns `false` when the matrix is not numerically positive definite.
pub(crate) fn spd_solve_in_place(a: &mut [f64], n: usize, b: &mut [f64]) -> bool {
    // Plain column-oriented Cholesky (Golub & Van Loan, Alg. 4.2.1) on a
    // row-major n×n buffer; used for the K×K systems of the ridge path.
    for j in 0..n {
        let mut d = a[j * n + j];
        for k in 0..j {
            d -= a[j * n + k] * a[j * n + k];
        }
        if d.is_nan() || d <= 0.0 {
            return false;
        }
        let d = d.sqrt();
        a[j * n + j] = d;
        for i in j + 1..n {
            let mut s = a[i * n + j];
            for k in 0..j {
                s -= a[i * n + k] * a[j * n + k];
            }
            a[i * n + j] = s / d;
        }
    }
    for i in 0..n {
        let mut s = b[i];
        for k in 0..i {
            s -= a[i * n + k] * b[k];
        }
        b[i] = s / a[i * n + i];
    }
    for i in (0..n).rev() {
        let mut s = b[i];
        for k in i + 1..n {
            s -= a[k * n + i] * b[k];
        }
        b[i] = s / a[i * n + i];
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One workspace serves decompositions of any size: it grows to the
    /// largest request and is then reused, and the answers equal those with
    /// fresh scratch every time, bit for bit.
    #[test]
    fn a_workspace_grows_once_and_changes_no_answer() {
        let sym = |n: usize| {
            Mat::from_fn(n, n, |i, j| 1.0 / (1.0 + (i as f64 - j as f64).abs()) + if i == j { n as f64 } else { 0.0 })
        };
        let mut ws = Workspace::default();
        let mut held = Vec::new();
        for n in [40, 12, 40, 7] {
            let a = sym(n);
            let shared = sym_eigen_desc(Kernels::SEQUENTIAL, &mut ws, a.as_ref(), "test").unwrap();
            let fresh = sym_eigen_desc(Kernels::SEQUENTIAL, &mut Workspace::default(), a.as_ref(), "test").unwrap();
            assert_eq!(shared.0, fresh.0);
            assert_eq!(shared.1, fresh.1);
            held.push(ws.held_bytes());
        }
        assert!(held[0] > 0);
        assert!(held.iter().all(|&b| b == held[0]), "grown past the first, largest request: {held:?}");
    }

    #[test]
    fn eigen_descending_reconstructs_matrix() {
        let a = Mat::from_fn(4, 4, |i, j| 1.0 / (1.0 + i as f64 + j as f64) + if i == j { 1.0 } else { 0.0 });
        let (vals, vecs) = sym_eigen_desc(Kernels::SEQUENTIAL, &mut Workspace::default(), a.as_ref(), "test").unwrap();
        assert!(vals.windows(2).all(|w| w[0] >= w[1]));
        for i in 0..4 {
            for j in 0..4 {
                let r: f64 = (0..4).map(|k| vecs[(i, k)] * vals[k] * vecs[(j, k)]).sum();
                assert!((r - a[(i, j)]).abs() < 1e-13);
            }
        }
    }

    #[test]
    fn extreme_eigenvalues_match_the_full_eigensolve() {
        for n in [1usize, 2, 3, 7, 40, 90] {
            let a = Mat::from_fn(n, n, |i, j| {
                let (x, y) = (i as f64, j as f64);
                (0.3 * (x + 1.0) * (y + 2.0)).sin()
                    + (0.3 * (y + 1.0) * (x + 2.0)).sin()
                    + if i == j { 0.5 } else { 0.0 }
            });
            let (vals, _) = sym_eigen_desc(Kernels::SEQUENTIAL, &mut Workspace::default(), a.as_ref(), "test").unwrap();
            let (hi, lo) = sym_extreme_eigenvalues(Kernels::SEQUENTIAL, a.as_ref(), "test").unwrap();
            let scale = vals[0].abs().max(vals[n - 1].abs());
            assert!((hi - vals[0]).abs() <= 1e-13 * scale, "n={n} max {hi} vs {}", vals[0]);
            assert!((lo - vals[n - 1]).abs() <= 1e-13 * scale, "n={n} min {lo} vs {}", vals[n - 1]);
        }
        // A double eigenvalue at both ends: diag(3, 3, 1, 1).
        let a = Mat::from_fn(4, 4, |i, j| if i == j { if i < 2 { 3.0 } else { 1.0 } } else { 0.0 });
        let (hi, lo) = sym_extreme_eigenvalues(Kernels::SEQUENTIAL, a.as_ref(), "test").unwrap();
        assert!((hi - 3.0).abs() < 1e-14 && (lo - 1.0).abs() < 1e-14);
    }

    #[test]
    fn spd_solve_matches_hand_example() {
        // [[4, 2], [2, 3]] x = [2, 1] has x = [0.5, 0] (by hand).
        let mut a = vec![4.0, 2.0, 2.0, 3.0];
        let mut b = vec![2.0, 1.0];
        assert!(spd_solve_in_place(&mut a, 2, &mut b));
        assert!((b[0] - 0.5).abs() < 1e-15 && b[1].abs() < 1e-15);
        let mut bad = vec![1.0, 2.0, 2.0, 1.0];
        assert!(!spd_solve_in_place(&mut bad, 2, &mut [0.0, 0.0]));
    }
}
