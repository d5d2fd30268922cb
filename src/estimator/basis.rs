//! The principal-component basis of a block of periods under each scaling
//! (SPEC §4), through the N×N matrix or, when periods are fewer than
//! factors, the T×T Gram matrix.

use faer::Mat;

use super::dense::{self, Workspace};
use super::error::EstimateError;
use super::moments::Moments;
use super::settings::Scaling;

/// Which eigenproblem yields the components.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum EigenPath {
    /// The Gram path when the factors outnumber the rows of the scaled data.
    Auto,
    /// Always the N×N matrix C = Y'Y.
    Factors,
    /// Always the M×M Gram matrix YY' (M periods, plus one row for risk-premium PCA).
    Gram,
}

/// Leading components of one block of periods.
#[derive(Clone, Debug)]
pub struct ComponentBasis {
    /// Column scale s of each factor.
    pub scale: Vec<f64>,
    /// Eigenvalues of C, descending (as many as were computed).
    pub eigenvalues: Vec<f64>,
    /// tr(C).
    pub trace: f64,
    /// Number of eigenvalues above the numerical-rank threshold.
    pub rank: usize,
    /// Component portfolios q_k = diag(s) v_k, n × k, signed so that μ'q_k ≥ 0.
    pub q: Mat<f64>,
    /// Unit eigenvectors v_k, n × k, with the same signs as `q`.
    pub v: Mat<f64>,
    /// μ_F = Q'μ.
    pub mu_f: Vec<f64>,
    /// Σ_F = Q'ΣQ, k × k; diagonal (= eigenvalues) for every scaling but risk-premium.
    pub sigma_f: Mat<f64>,
    /// Whether the Gram path was used.
    pub used_gram: bool,
    /// The scaling it was computed with.
    pub scaling: Scaling,
}

/// Per-period Sharpe ratios shrunk toward their cross-sectional mean (SPEC §11):
/// SR_i ← SR̄ + (1 − B)(SR_i − SR̄), B = (N − 3)/(T·Σ_j(SR_j − SR̄)²) clipped to
/// [0, 1] (James–Stein with sampling variance 1/T; Efron & Morris 1975). Only
/// factors with variance in the block take part; N ≤ 3 leaves them unshrunk.
pub fn shrunk_sharpe(mom: &Moments) -> Vec<f64> {
    let t = mom.periods() as f64;
    let live: Vec<usize> = (0..mom.sd.len()).filter(|&j| mom.sd[j] > 0.0).collect();
    let sr: Vec<f64> = (0..mom.sd.len()).map(|j| mom.sharpe(j)).collect();
    let n = live.len() as f64;
    if live.is_empty() {
        return sr;
    }
    let mean = live.iter().map(|&j| sr[j]).sum::<f64>() / n;
    let spread: f64 = live.iter().map(|&j| (sr[j] - mean).powi(2)).sum();
    let b = if spread > 0.0 { ((n - 3.0) / (t * spread)).clamp(0.0, 1.0) } else { 1.0 };
    if b == 0.0 {
        return sr;
    }
    sr.iter().map(|&x| mean + (1.0 - b) * (x - mean)).collect()
}

impl ComponentBasis {
    /// Computes the first `k` components of the block (fewer when the rank is lower).
    ///
    /// # Errors
    /// [`EstimateError::Numerical`] when the eigendecomposition does not converge.
    pub fn compute(
        mom: &Moments,
        scaling: Scaling,
        rp_gamma: f64,
        k: usize,
        path: EigenPath,
    ) -> Result<ComponentBasis, EstimateError> {
        ComponentBasis::compute_in(mom, scaling, rp_gamma, k, path, &mut Workspace::default())
    }

    /// [`ComponentBasis::compute`] with the decomposition's scratch in `ws`
    /// (a fit's bases share one).
    pub(crate) fn compute_in(
        mom: &Moments,
        scaling: Scaling,
        rp_gamma: f64,
        k: usize,
        path: EigenPath,
        ws: &mut Workspace,
    ) -> Result<ComponentBasis, EstimateError> {
        let (t, n) = mom.centered.shape();
        let shrunk = match scaling {
            Scaling::SharpeShrunk => shrunk_sharpe(mom),
            Scaling::Auto => {
                return Err(EstimateError::Numerical {
                    stage: "component basis",
                    detail: "scaling `auto` is resolved before a basis is computed".into(),
                });
            }
            _ => Vec::new(),
        };
        let scale: Vec<f64> = (0..n)
            .map(|j| {
                let (mu, sd) = (mom.mean[j], mom.sd[j]);
                let s = match scaling {
                    // Scaled PCA with the Sharpe ratio as the scale: SR_i/σ_i = μ_i/σ_i².
                    Scaling::Sharpe => mu / (sd * sd),
                    Scaling::SharpeRaw => mu / sd,
                    Scaling::SharpeShrunk => shrunk[j] / sd,
                    Scaling::Standardized => 1.0 / sd,
                    Scaling::Covariance | Scaling::RiskPremium | Scaling::Auto => 1.0,
                };
                // A factor without variance in this block (possible inside a fold) carries no weight.
                if sd > 0.0 && s.is_finite() { s } else { 0.0 }
            })
            .collect();

        // C = Y'Y with Y the scaled data, so both eigen paths share one matrix.
        let y = match scaling {
            Scaling::RiskPremium => {
                // Lettau & Pelger (2020): C = R̃'R̃/T + γ r̄r̄' = X_c'X_c/T + (1+γ) r̄r̄'.
                let a = 1.0 / (t as f64).sqrt();
                let b = (1.0 + rp_gamma).max(0.0).sqrt();
                Mat::from_fn(t + 1, n, |i, j| if i < t { mom.centered[(i, j)] * a } else { mom.mean[j] * b })
            }
            _ => {
                let a = 1.0 / (t as f64 - 1.0).sqrt();
                Mat::from_fn(t, n, |i, j| mom.centered[(i, j)] * scale[j] * a)
            }
        };
        let m = y.nrows();
        let trace: f64 = (0..n)
            .map(|j| {
                let c = super::moments::column(&y, j);
                super::moments::dot(c, c)
            })
            .sum();
        let used_gram = match path {
            EigenPath::Auto => n > m,
            EigenPath::Factors => false,
            EigenPath::Gram => true,
        };

        let (eigenvalues, mut v) = if used_gram {
            let g = dense::gram_nt(mom.kernels, y.as_ref());
            let (vals, u) = dense::sym_eigen_desc(mom.kernels, ws, g.as_ref(), "Gram eigendecomposition")?;
            let keep = k.min(m).min(n);
            let tol = rank_tolerance(&vals, m.max(n));
            // v = Y'u/√λ maps a Gram eigenvector to the matching factor-space one.
            let yu = dense::mul_tn(mom.kernels, y.as_ref(), u.as_ref().subcols(0, keep));
            let v = Mat::from_fn(n, keep, |i, c| if vals[c] > tol { yu[(i, c)] / vals[c].sqrt() } else { 0.0 });
            (vals, v)
        } else {
            let c = dense::gram_tn(mom.kernels, y.as_ref());
            let (vals, u) = dense::sym_eigen_desc(mom.kernels, ws, c.as_ref(), "factor eigendecomposition")?;
            let keep = k.min(n);
            (vals, u.as_ref().subcols(0, keep).to_owned())
        };
        let tol = rank_tolerance(&eigenvalues, m.max(n));
        let rank = eigenvalues.iter().take_while(|&&l| l > tol).count();
        let kk = v.ncols();

        let mut q = Mat::from_fn(n, kk, |i, c| scale[i] * v[(i, c)]);
        let mut mu_f = vec![0.0; kk];
        for c in 0..kk {
            let d: f64 = (0..n).map(|i| mom.mean[i] * q[(i, c)]).sum();
            // Sign so that μ'q ≥ 0; an exact zero falls back to the largest entry of v being positive.
            let flip = if d != 0.0 {
                d < 0.0
            } else {
                let mut best = 0;
                for i in 1..n {
                    if v[(i, c)].abs() > v[(best, c)].abs() {
                        best = i;
                    }
                }
                v[(best, c)] < 0.0
            };
            if flip {
                for i in 0..n {
                    q[(i, c)] = -q[(i, c)];
                    v[(i, c)] = -v[(i, c)];
                }
            }
            mu_f[c] = d.abs();
        }

        let sigma_f = if scaling.has_diagonal_components() {
            Mat::from_fn(kk, kk, |a, b| if a == b { eigenvalues[a].max(0.0) } else { 0.0 })
        } else {
            let fc = dense::mul(mom.kernels, mom.centered.as_ref(), q.as_ref());
            let mut s = dense::gram_tn(mom.kernels, fc.as_ref());
            let d = t as f64 - 1.0;
            for a in 0..kk {
                for b in 0..kk {
                    s[(a, b)] /= d;
                }
            }
            s
        };

        Ok(ComponentBasis { scale, eigenvalues, trace, rank, q, v, mu_f, sigma_f, used_gram, scaling })
    }

    /// Number of components held.
    pub fn len(&self) -> usize {
        self.q.ncols()
    }

    /// Whether no component is held.
    pub fn is_empty(&self) -> bool {
        self.q.ncols() == 0
    }

    /// tr(Σ_F) over the first `k` components: the τ of the KNS penalty.
    pub fn trace_f(&self, k: usize) -> f64 {
        (0..k).map(|i| self.sigma_f[(i, i)]).sum()
    }
}

/// Eigenvalues at or below this are numerically zero: the largest times the
/// dimension times machine epsilon (the numpy.linalg.matrix_rank convention).
pub(crate) fn rank_tolerance(desc: &[f64], dim: usize) -> f64 {
    desc.first().copied().unwrap_or(0.0).max(0.0) * dim as f64 * f64::EPSILON
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shrunk_sharpe_follows_james_stein() {
        // Hand computation (SPEC §11): five factors, T = 10, per-period Sharpe ratios
        // (0.5, 0.3, 0.1, −0.1, 0.2): mean 0.2, Σ(SR − mean)² = 0.09 + 0.01 + 0.01 + 0.09 + 0 = 0.2,
        // B = (5 − 3)/(10 · 0.2) = 1 − 0 → B = 1: every ratio becomes the mean.
        let sr = [0.5, 0.3, 0.1, -0.1, 0.2];
        let make = |t: usize| Moments {
            beta: vec![0.0; 5],
            mean: sr.to_vec(),
            sd: vec![1.0; 5],
            centered: Mat::zeros(t, 5),
            kernels: crate::estimator::dense::Kernels::SEQUENTIAL,
        };
        for v in shrunk_sharpe(&make(10)) {
            assert!((v - 0.2).abs() < 1e-15);
        }
        // T = 40: B = 2/(40 · 0.2) = 0.25, SR_i ← 0.2 + 0.75 (SR_i − 0.2).
        let got = shrunk_sharpe(&make(40));
        for (g, s) in got.iter().zip(sr) {
            assert!((g - (0.2 + 0.75 * (s - 0.2))).abs() < 1e-15, "{g} vs {s}");
        }
        // Three factors or fewer: no shrinkage (the positive part of N − 3).
        let three = Moments {
            beta: vec![0.0; 3],
            mean: vec![0.5, 0.1, -0.2],
            sd: vec![1.0; 3],
            centered: Mat::zeros(40, 3),
            kernels: crate::estimator::dense::Kernels::SEQUENTIAL,
        };
        assert_eq!(shrunk_sharpe(&three), vec![0.5, 0.1, -0.2]);
    }

    fn moments(t: usize, n: usize) -> Moments {
        let panel = crate::demo::synthetic_panel(11, t, n);
        let r = faer::Mat::from_fn(t, n, |i, j| panel.returns[i * n + j]);
        Moments::compute(r.as_ref(), panel.market.as_deref())
    }

    #[test]
    fn components_are_orthonormal_sorted_and_exhaust_the_trace() {
        let mom = moments(90, 8);
        for scaling in [Scaling::Covariance, Scaling::Standardized, Scaling::Sharpe] {
            let b = ComponentBasis::compute(&mom, scaling, 10.0, 8, EigenPath::Factors).unwrap();
            assert!(b.eigenvalues.windows(2).all(|w| w[0] >= w[1]), "{scaling:?}: descending");
            let sum: f64 = b.eigenvalues.iter().sum();
            assert!((sum - b.trace).abs() <= 1e-10 * b.trace, "{scaling:?}: all eigenvalues sum to tr(C)");
            for a in 0..b.len() {
                for c in 0..b.len() {
                    let dot: f64 = (0..8).map(|i| b.v[(i, a)] * b.v[(i, c)]).sum();
                    let want = if a == c { 1.0 } else { 0.0 };
                    assert!((dot - want).abs() < 1e-10, "{scaling:?}: v{a}·v{c} = {dot}");
                }
                assert!(b.mu_f[a] >= 0.0, "{scaling:?}: signed so that μ'q ≥ 0");
                // Σ_F = Q'ΣQ is diagonal for these scalings, so ridge acts per component.
                for c in 0..b.len() {
                    if a != c {
                        let off = b.sigma_f[(a, c)].abs();
                        assert!(off <= 1e-10 * b.sigma_f[(a, a)].max(b.sigma_f[(c, c)]), "{scaling:?}: Σ_F[{a},{c}]");
                    }
                }
            }
        }
    }

    #[test]
    fn gram_and_factor_paths_agree() {
        // T < N: both paths must give the same leading eigenvalues.
        let mom = moments(30, 40);
        let f = ComponentBasis::compute(&mom, Scaling::Covariance, 10.0, 5, EigenPath::Factors).unwrap();
        let g = ComponentBasis::compute(&mom, Scaling::Covariance, 10.0, 5, EigenPath::Gram).unwrap();
        assert!(g.used_gram && !f.used_gram);
        for k in 0..5 {
            assert!((f.eigenvalues[k] - g.eigenvalues[k]).abs() <= 1e-9 * f.eigenvalues[0]);
        }
        assert!(f.rank <= 29, "centring and demarketing leave at most T − 1 dimensions");
    }
}
