//! Shrunk mean–variance coefficients on the components (SPEC §5): the KNS
//! ridge, the naive elastic net, and the unshrunk plug-in baseline.

use faer::Mat;

use super::basis::ComponentBasis;
use super::dense;
use super::error::EstimateError;
use super::moments::{Moments, column, dot};

/// KNS penalty γ = tr(Σ_F)/(κ² T) with κ per period (Kozak, Nagel & Santosh 2020).
pub fn kns_gamma(trace_f: f64, kappa_per_period: f64, periods: usize) -> f64 {
    trace_f / (kappa_per_period * kappa_per_period * periods as f64)
}

/// Solver outcome for one (K, γ) point.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct SolveInfo {
    /// False when coordinate descent hit its sweep limit.
    pub converged: bool,
    /// Sweeps of coordinate descent (0 for closed forms).
    pub sweeps: usize,
}

/// Largest number of coordinate-descent sweeps before giving up.
pub const MAX_SWEEPS: usize = 100_000;
/// Coordinate descent stops when no coefficient moves by more than this
/// fraction of the largest coefficient.
pub const CD_TOLERANCE: f64 = 1e-15;

/// Evaluates b(K, γ) for one basis without recomputing the basis: the
/// shrinkage path over the whole (K, κ) grid.
#[derive(Clone, Debug)]
pub struct ShrinkagePath<'a> {
    basis: &'a ComponentBasis,
    diagonal: bool,
    l1: f64,
    scratch: Vec<f64>,
    /// Diagonal case: the soft-thresholded means and the component variances,
    /// computed once for the whole grid.
    shrunk_mu: Vec<f64>,
    variances: Vec<f64>,
}

impl<'a> ShrinkagePath<'a> {
    /// A path over `basis` with elastic-net L1 penalty `l1` (0 for ridge).
    pub fn new(basis: &'a ComponentBasis, diagonal: bool, l1: f64) -> Self {
        let k = basis.len();
        let (shrunk_mu, variances) = if diagonal {
            let h = l1 / 2.0;
            (
                basis.mu_f.iter().map(|&m| soft_threshold(m, h)).collect(),
                (0..k).map(|j| basis.sigma_f[(j, j)]).collect(),
            )
        } else {
            (Vec::new(), Vec::new())
        };
        let scratch = if diagonal { Vec::new() } else { vec![0.0; k * k] };
        ShrinkagePath { basis, diagonal, l1, scratch, shrunk_mu, variances }
    }

    /// Coefficients on the first `k` components with ridge penalty `gamma`,
    /// written to `b[..k]`.
    ///
    /// Diagonal case: b_k = sign(μ_k)·max(|μ_k| − γ₁/2, 0)/(λ_k + γ₂).
    /// General case: (Σ_F + γI)⁻¹μ_F by Cholesky, or coordinate descent on the
    /// naive elastic net when γ₁ > 0 (SPEC §5).
    pub fn solve(&mut self, k: usize, gamma: f64, b: &mut [f64]) -> SolveInfo {
        let mu = &self.basis.mu_f[..k];
        let s = &self.basis.sigma_f;
        let b = &mut b[..k];
        if self.diagonal {
            for ((bj, m), v) in b.iter_mut().zip(&self.shrunk_mu[..k]).zip(&self.variances[..k]) {
                *bj = m / (v + gamma);
            }
            return SolveInfo { converged: true, sweeps: 0 };
        }
        if self.l1 == 0.0 {
            let a = &mut self.scratch[..k * k];
            for r in 0..k {
                for c in 0..k {
                    a[r * k + c] = s[(r, c)] + if r == c { gamma } else { 0.0 };
                }
            }
            b.copy_from_slice(mu);
            if dense::spd_solve_in_place(a, k, b) {
                return SolveInfo { converged: true, sweeps: 0 };
            }
            // Not numerically positive definite (γ underflowed): fall through to descent.
        }
        coordinate_descent(s, mu, gamma, self.l1, b)
    }
}

/// Soft threshold S(x, h) = sign(x)·max(|x| − h, 0).
pub fn soft_threshold(x: f64, h: f64) -> f64 {
    if x > h {
        x - h
    } else if x < -h {
        x + h
    } else {
        0.0
    }
}

/// Coordinate descent for min (μ − Σb)'Σ⁻¹(μ − Σb) + γ₂‖b‖² + γ₁‖b‖₁, written
/// in terms of Σ and μ directly: with X = Σ^{1/2}, y = Σ^{-1/2}μ the update is
/// b_j = S(μ_j − Σ_{l≠j} Σ_jl b_l, γ₁/2)/(Σ_jj + γ₂) (Friedman, Hastie &
/// Tibshirani 2010, eq. 5, on K pseudo-observations).
fn coordinate_descent(s: &faer::Mat<f64>, mu: &[f64], gamma: f64, l1: f64, b: &mut [f64]) -> SolveInfo {
    let k = mu.len();
    b.fill(0.0);
    let h = l1 / 2.0;
    for sweep in 1..=MAX_SWEEPS {
        let mut max_change = 0.0f64;
        let mut max_b = 0.0f64;
        for j in 0..k {
            let mut rho = mu[j];
            for l in 0..k {
                if l != j {
                    rho -= s[(j, l)] * b[l];
                }
            }
            let new = soft_threshold(rho, h) / (s[(j, j)] + gamma);
            max_change = max_change.max((new - b[j]).abs());
            b[j] = new;
            max_b = max_b.max(new.abs());
        }
        if max_change <= CD_TOLERANCE * max_b || max_b == 0.0 && max_change == 0.0 {
            return SolveInfo { converged: true, sweeps: sweep };
        }
    }
    SolveInfo { converged: false, sweeps: MAX_SWEEPS }
}

/// The plug-in portfolio Σ⁺μ of all usable factors.
#[derive(Clone, Debug)]
pub struct PlugIn {
    /// Weights over the demarketed factors.
    pub weights: Vec<f64>,
    /// Whether Σ was singular and the minimum-norm least-squares solution was used.
    pub singular: bool,
    /// Numerical rank of Σ.
    pub rank: usize,
}

/// Σ⁻¹μ through the eigenvalues of Σ = V diag(s²) V' from a thin SVD of
/// X_c/√(T−1); eigenvalues at or below n·ε·max are dropped, which gives the
/// minimum-norm least-squares solution when Σ is singular (the
/// numpy.linalg.lstsq convention, rcond = ε·n).
///
/// # Errors
/// [`EstimateError::Numerical`] when the SVD does not converge.
pub fn plug_in(mom: &Moments) -> Result<PlugIn, EstimateError> {
    let (t, n) = mom.centered.shape();
    let a = 1.0 / (t as f64 - 1.0).sqrt();
    let x = faer::Mat::from_fn(t, n, |i, j| mom.centered[(i, j)] * a);
    let (s, _u, v) = dense::thin_svd(mom.kernels, x.as_ref(), "plug-in SVD")?;
    let eig: Vec<f64> = s.iter().map(|x| x * x).collect();
    let tol = eig.first().copied().unwrap_or(0.0) * n as f64 * f64::EPSILON;
    let rank = eig.iter().filter(|&&e| e > tol).count();
    let mut w = vec![0.0; n];
    for (c, &e) in eig.iter().enumerate() {
        if e <= tol {
            continue;
        }
        let proj: f64 = (0..n).map(|i| v[(i, c)] * mom.mean[i]).sum::<f64>() / e;
        for (i, wi) in w.iter_mut().enumerate() {
            *wi += v[(i, c)] * proj;
        }
    }
    Ok(PlugIn { weights: w, singular: rank < n, rank })
}

/// Ledoit & Wolf (2004) shrinkage of the sample covariance towards a scaled
/// identity, Σ_LW = (1 − δ)S + δ·(tr S/N)·I with S = X_c'X_c/T (divisor T),
/// the estimator and shrinkage intensity of scikit-learn `LedoitWolf`.
///
/// Held in factor form, Σ_LW = a·I + c·X_c'X_c with a = δ·tr S/N and
/// c = (1 − δ)/T: the N × N matrix is formed only on request ([`dense`]),
/// so a window of 10,000 factors costs its T × N panel and one T × T Gram
/// matrix, not 800 MB.
///
/// [`dense`]: LedoitWolf::dense
#[derive(Clone, Debug)]
pub struct LedoitWolf {
    /// δ, the shrinkage intensity in [0, 1].
    pub shrinkage: f64,
    /// a = δ·tr S/N, the identity part.
    pub ridge: f64,
    /// c = (1 − δ)/T, the weight of X_c'X_c.
    pub scale: f64,
    /// X_c, T × N.
    x: Mat<f64>,
    /// X_cX_c', T × T, when N > T (computed for δ, reused by the Woodbury solve).
    periods_gram: Option<Mat<f64>>,
    /// The kernels of the moments it was estimated from.
    kernels: dense::Kernels,
}

impl LedoitWolf {
    /// The estimator of one block of periods, in O(N·T·min(N, T)) time and
    /// O(N·T + min(N, T)²) memory: ‖X_c'X_c‖²_F through the smaller Gram
    /// matrix, and Σ_ab (X²'X²)_ab = Σ_t (Σ_a x_ta²)².
    pub fn new(mom: &Moments) -> LedoitWolf {
        let (t, n) = mom.centered.shape();
        let (tf, nf) = (t as f64, n as f64);
        let x = &mom.centered;
        let gram =
            if n <= t { dense::gram_tn(mom.kernels, x.as_ref()) } else { dense::gram_nt(mom.kernels, x.as_ref()) };
        let m = gram.nrows();
        let mut delta_sum = 0.0;
        for b in 0..m {
            for a in 0..m {
                delta_sum += gram[(a, b)] * gram[(a, b)];
            }
        }
        let mut trace_sum = 0.0;
        let mut row_sq = vec![0.0; t];
        for j in 0..n {
            for (r, v) in row_sq.iter_mut().zip(column(x, j)) {
                *r += v * v;
            }
        }
        let mut beta_sum = 0.0;
        for r in &row_sq {
            trace_sum += r;
            beta_sum += r * r;
        }
        let trace_s = trace_sum / tf;
        let mu = trace_s / nf;
        let delta_raw = delta_sum / (tf * tf);
        let beta = (beta_sum / tf - delta_raw) / (nf * tf);
        let delta = (delta_raw - 2.0 * mu * trace_s + nf * mu * mu) / nf;
        let beta = beta.min(delta);
        let shrinkage = if beta == 0.0 { 0.0 } else { beta / delta };
        let periods_gram = (n > t).then_some(gram);
        LedoitWolf {
            shrinkage,
            ridge: shrinkage * mu,
            scale: (1.0 - shrinkage) / tf,
            x: x.clone(),
            periods_gram,
            kernels: mom.kernels,
        }
    }

    /// Number of factors N.
    pub fn dim(&self) -> usize {
        self.x.ncols()
    }

    /// Number of periods T.
    pub fn periods(&self) -> usize {
        self.x.nrows()
    }

    /// X_c, T × N: Σ_LW = a·I + c·X_c'X_c.
    pub fn panel(&self) -> &Mat<f64> {
        &self.x
    }

    /// X_c v, T values.
    pub fn project(&self, v: &[f64]) -> Vec<f64> {
        let mut out = vec![0.0; self.periods()];
        for (j, &vj) in v.iter().enumerate() {
            if vj != 0.0 {
                for (o, x) in out.iter_mut().zip(column(&self.x, j)) {
                    *o += x * vj;
                }
            }
        }
        out
    }

    /// u'Σ_LW v = a·u'v + c·(X_c u)'(X_c v).
    pub fn quad(&self, u: &[f64], v: &[f64]) -> f64 {
        let xu = self.project(u);
        let xv = if std::ptr::eq(u, v) { xu.clone() } else { self.project(v) };
        self.ridge * dot(u, v) + self.scale * dot(&xu, &xv)
    }

    /// Σ_LW v.
    pub fn times(&self, v: &[f64]) -> Vec<f64> {
        let xv = self.project(v);
        (0..self.dim()).map(|j| self.ridge * v[j] + self.scale * dot(column(&self.x, j), &xv)).collect()
    }

    /// Σ_LW as an N × N matrix.
    pub fn dense(&self) -> Mat<f64> {
        let mut s = dense::gram_tn(self.kernels, self.x.as_ref());
        let n = s.nrows();
        for b in 0..n {
            for a in 0..n {
                s[(a, b)] = self.scale * s[(a, b)] + if a == b { self.ridge } else { 0.0 };
            }
        }
        s
    }

    /// Σ_LW⁻¹v: by Cholesky of the N × N matrix when N ≤ T, else by the
    /// Woodbury identity, Σ_LW⁻¹ = (I − c·X_c'(a·I + c·X_cX_c')⁻¹X_c)/a, with
    /// one T × T Cholesky. `None` when Σ_LW is not numerically positive
    /// definite.
    pub fn solve(&self, v: &[f64]) -> Option<Vec<f64>> {
        let (t, n) = self.x.shape();
        if n <= t {
            let sigma = self.dense();
            let mut a: Vec<f64> = (0..n * n).map(|i| sigma[(i / n, i % n)]).collect();
            let mut w = v.to_vec();
            return dense::spd_solve_in_place(&mut a, n, &mut w).then_some(w);
        }
        let g = self.periods_gram.as_ref().filter(|_| self.ridge > 0.0)?;
        let mut m: Vec<f64> = (0..t * t)
            .map(|i| self.scale * g[(i / t, i % t)] + if i / t == i % t { self.ridge } else { 0.0 })
            .collect();
        let mut z = self.project(v);
        if !dense::spd_solve_in_place(&mut m, t, &mut z) {
            return None;
        }
        Some((0..n).map(|j| (v[j] - self.scale * dot(column(&self.x, j), &z)) / self.ridge).collect())
    }
}

/// The plug-in portfolio Σ_LW⁻¹μ with the Ledoit–Wolf covariance.
///
/// # Errors
/// [`EstimateError::Numerical`] if Σ_LW is not positive definite (all returns constant).
pub fn plug_in_ledoit_wolf(mom: &Moments) -> Result<PlugIn, EstimateError> {
    let n = mom.mean.len();
    let w = LedoitWolf::new(mom).solve(&mom.mean).ok_or_else(|| EstimateError::Numerical {
        stage: "Ledoit-Wolf plug-in",
        detail: "the shrunk covariance is not positive definite".into(),
    })?;
    Ok(PlugIn { weights: w, singular: false, rank: n })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The factor form against the N × N matrix it stands for, on a wide
    /// window (N > T, the Woodbury path) and a narrow one.
    #[test]
    fn factor_form_products_and_solve_match_the_dense_matrix() {
        for (t, n) in [(12usize, 30usize), (40, 9)] {
            let r = Mat::from_fn(t, n, |i, j| ((i * 7 + j * 13) as f64 * 0.37).sin() + 0.1 * (j as f64 * 0.5).cos());
            let mom = Moments::compute(r.as_ref(), None);
            let lw = LedoitWolf::new(&mom);
            assert!(lw.shrinkage > 0.0 && lw.shrinkage <= 1.0);
            let d = lw.dense();
            let v: Vec<f64> = (0..n).map(|j| (j as f64 * 0.9).cos()).collect();
            let dv: Vec<f64> = (0..n).map(|i| (0..n).map(|j| d[(i, j)] * v[j]).sum()).collect();
            let scale = dv.iter().fold(0.0f64, |m, x| m.max(x.abs()));
            for (a, b) in lw.times(&v).iter().zip(&dv) {
                assert!((a - b).abs() <= 1e-13 * scale, "{t}x{n}: Σv {a} vs {b}");
            }
            let q: f64 = v.iter().zip(&dv).map(|(a, b)| a * b).sum();
            assert!((lw.quad(&v, &v) - q).abs() <= 1e-13 * q.abs());
            let x = lw.solve(&v).expect("positive definite");
            let back: Vec<f64> = (0..n).map(|i| (0..n).map(|j| d[(i, j)] * x[j]).sum()).collect();
            for (a, b) in back.iter().zip(&v) {
                assert!((a - b).abs() <= 1e-9, "{t}x{n}: Σ(Σ⁻¹v) {a} vs {b}");
            }
        }
    }

    #[test]
    fn soft_threshold_cases() {
        assert_eq!(soft_threshold(3.0, 1.0), 2.0);
        assert_eq!(soft_threshold(-3.0, 1.0), -2.0);
        assert_eq!(soft_threshold(0.5, 1.0), 0.0);
    }

    #[test]
    fn coordinate_descent_matches_closed_form_on_diagonal() {
        // On a diagonal Σ the descent must reproduce the closed form of SPEC §5 in one sweep.
        let s = faer::Mat::from_fn(3, 3, |i, j| if i == j { [2.0, 1.0, 0.5][i] } else { 0.0 });
        let mu = [0.3, -0.2, 0.01];
        let mut b = [0.0; 3];
        let info = coordinate_descent(&s, &mu, 0.1, 0.04, &mut b);
        assert!(info.converged);
        for j in 0..3 {
            let want = soft_threshold(mu[j], 0.02) / (s[(j, j)] + 0.1);
            assert!((b[j] - want).abs() < 1e-16, "{j}: {} vs {want}", b[j]);
        }
    }
}
