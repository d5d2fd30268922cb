//! Shrunk mean–variance coefficients on the components (SPEC §5): the KNS
//! ridge, the naive elastic net, and the unshrunk plug-in baseline.

use super::basis::ComponentBasis;
use super::dense;
use super::error::EstimateError;
use super::moments::Moments;

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
pub fn plug_in(mom: &Moments) -> Result<PlugIn, EstimateError> {
    let (t, n) = mom.centered.shape();
    let a = 1.0 / (t as f64 - 1.0).sqrt();
    let x = faer::Mat::from_fn(t, n, |i, j| mom.centered[(i, j)] * a);
    let (s, _u, v) = dense::thin_svd(x.as_ref(), "plug-in SVD")?;
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
/// Returns Σ_LW and δ.
pub fn ledoit_wolf(mom: &Moments) -> (faer::Mat<f64>, f64) {
    let (t, n) = mom.centered.shape();
    let tf = t as f64;
    let x = &mom.centered;
    let mut s = dense::gram_tn(x.as_ref());
    let x2 = faer::Mat::from_fn(t, n, |i, j| x[(i, j)] * x[(i, j)]);
    let x2tx2 = dense::gram_tn(x2.as_ref());
    let mut trace_s = 0.0;
    for j in 0..n {
        trace_s += s[(j, j)] / tf;
    }
    let mu = trace_s / n as f64;
    let mut beta_sum = 0.0;
    let mut delta_sum = 0.0;
    for a in 0..n {
        for b in 0..n {
            beta_sum += x2tx2[(a, b)];
            delta_sum += s[(a, b)] * s[(a, b)];
        }
    }
    let delta_raw = delta_sum / (tf * tf);
    let beta = (beta_sum / tf - delta_raw) / (n as f64 * tf);
    let delta = (delta_raw - 2.0 * mu * trace_s + n as f64 * mu * mu) / n as f64;
    let beta = beta.min(delta);
    let shrinkage = if beta == 0.0 { 0.0 } else { beta / delta };
    for a in 0..n {
        for b in 0..n {
            s[(a, b)] = (1.0 - shrinkage) * s[(a, b)] / tf + if a == b { shrinkage * mu } else { 0.0 };
        }
    }
    (s, shrinkage)
}

/// The plug-in portfolio Σ_LW⁻¹μ with the Ledoit–Wolf covariance.
///
/// # Errors
/// [`EstimateError::Numerical`] if Σ_LW is not positive definite (all returns constant).
pub fn plug_in_ledoit_wolf(mom: &Moments) -> Result<PlugIn, EstimateError> {
    let (sigma, _) = ledoit_wolf(mom);
    let n = sigma.nrows();
    let mut a: Vec<f64> = (0..n * n).map(|i| sigma[(i / n, i % n)]).collect();
    let mut w = mom.mean.clone();
    if !dense::spd_solve_in_place(&mut a, n, &mut w) {
        return Err(EstimateError::Numerical {
            stage: "Ledoit-Wolf plug-in",
            detail: "the shrunk covariance is not positive definite".into(),
        });
    }
    Ok(PlugIn { weights: w, singular: false, rank: n })
}

#[cfg(test)]
mod tests {
    use super::*;

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
