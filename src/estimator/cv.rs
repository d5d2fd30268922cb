//! Time-series cross-validation over the number of components and κ
//! (SPEC §6): contiguous blocks as `numpy.array_split`, no shuffling, every
//! fold refitting demarketing, moments, scaling and components on the other
//! blocks.

use faer::{Mat, MatRef};

use super::basis::{ComponentBasis, EigenPath};
use super::calibration::HeldOutSample;
use super::dense::{self, Kernels, Workspace};
use super::error::EstimateError;
use super::moments::{Moments, demarket};
use super::settings::{CvCriterion, Scaling, ValidSettings};
use super::shrinkage::{ShrinkagePath, kns_gamma};
use super::stop::Stop;

/// A held-out covariance whose condition number exceeds this is too
/// ill-conditioned for the GLS pricing criterion.
pub const GLS_MAX_CONDITION: f64 = 1e10;

/// Mean held-out score for every (K, κ) tried.
#[derive(Clone, Debug, PartialEq)]
pub struct CvSurface {
    /// Component counts (rows).
    pub components: Vec<usize>,
    /// Annualised κ values (columns).
    pub kappas: Vec<f64>,
    /// Scores, row-major `components.len() × kappas.len()`; NaN where undefined.
    pub scores: Vec<f64>,
    /// The criterion scored.
    pub criterion: CvCriterion,
    /// Number of folds averaged.
    pub folds: usize,
}

/// Outcome of cross-validation.
#[derive(Clone, Debug)]
pub struct CrossValidation {
    /// The surface.
    pub surface: CvSurface,
    /// Chosen number of components.
    pub k: usize,
    /// Chosen annualised κ.
    pub kappa: f64,
    /// Best mean held-out score.
    pub best_score: f64,
    /// Mean held-out annualised Sharpe ratio at the chosen point.
    pub held_out_sharpe: f64,
    /// Whether any coordinate-descent solve hit its sweep limit.
    pub solver_limit_hit: bool,
    /// Every fold's portfolio at the chosen point, on its training block and
    /// held out: what the risk calibration of SPEC §13 measures.
    pub(crate) held_out: Vec<HeldOutSample>,
}

/// Block boundaries of `numpy.array_split(range(t), folds)`: the first
/// `t % folds` blocks hold one period more.
pub fn fold_bounds(t: usize, folds: usize) -> Vec<(usize, usize)> {
    let base = t / folds;
    let extra = t % folds;
    let mut out = Vec::with_capacity(folds);
    let mut start = 0;
    for f in 0..folds {
        let len = base + usize::from(f < extra);
        out.push((start, start + len));
        start += len;
    }
    out
}

/// Fewest training periods over the folds: T minus the largest block.
pub fn min_training_periods(t: usize, folds: usize) -> usize {
    t - t.div_ceil(folds)
}

/// What one fold needs to score any (K, κ): the training basis and the
/// held-out moments of the component returns, reduced to K×K forms so that
/// each grid point costs O(K²).
pub(crate) struct Fold {
    train_periods: usize,
    pub(crate) basis: ComponentBasis,
    /// Held-out means of the component returns.
    f_mean: Vec<f64>,
    /// Held-out covariance of the component returns (divisor T₂−1).
    f_cov: Mat<f64>,
    /// Held-out component returns, centred, T₂ × K (for the risk calibration).
    f_held: Mat<f64>,
    /// Pricing criteria: C₂'μ₂, C₂'C₂ and μ₂'μ₂ (whitened for GLS).
    pricing: Option<(Vec<f64>, Mat<f64>, f64)>,
}

impl Fold {
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn prepare(
        r: MatRef<'_, f64>,
        market: Option<&[f64]>,
        (start, end): (usize, usize),
        index: usize,
        settings: &ValidSettings,
        scaling: Scaling,
        k: usize,
        path: EigenPath,
        kernels: Kernels,
        ws: &mut Workspace,
    ) -> Result<Fold, EstimateError> {
        let (t, n) = r.shape();
        let train_rows: Vec<usize> = (0..start).chain(end..t).collect();
        let r_train = Mat::from_fn(train_rows.len(), n, |i, j| r[(train_rows[i], j)]);
        let m_train: Option<Vec<f64>> = market.map(|m| train_rows.iter().map(|&i| m[i]).collect());
        let mom = Moments::compute_with(r_train.as_ref(), m_train.as_deref(), kernels);
        let basis = ComponentBasis::compute_in(&mom, scaling, settings.rp_gamma, k, path, ws)?;

        // Held-out block, demarketed with the training betas (no look-ahead).
        let r_test = r.subrows(start, end - start);
        let m_test: Option<Vec<f64>> = market.map(|m| m[start..end].to_vec());
        let mut x2 = demarket(r_test, m_test.as_deref(), &mom.beta);
        let t2 = x2.nrows();
        let mu2: Vec<f64> = (0..n).map(|j| (0..t2).map(|i| x2[(i, j)]).sum::<f64>() / t2 as f64).collect();
        for j in 0..n {
            for i in 0..t2 {
                x2[(i, j)] -= mu2[j];
            }
        }
        let d2 = t2 as f64 - 1.0;
        let fc = dense::mul(kernels, x2.as_ref(), basis.q.as_ref());
        let kk = basis.len();
        let f_mean: Vec<f64> = (0..kk).map(|c| (0..n).map(|i| mu2[i] * basis.q[(i, c)]).sum()).collect();
        let mut f_cov = dense::gram_tn(kernels, fc.as_ref());
        scale_in_place(&mut f_cov, 1.0 / d2);

        let pricing = match settings.cv_criterion {
            CvCriterion::Sharpe => None,
            CvCriterion::PricingR2 => {
                // C₂ = cov(R̃₂, F₂) = X₂'F₂c/(T₂−1), n × K.
                let mut c2 = dense::mul_tn(kernels, x2.as_ref(), fc.as_ref());
                scale_in_place(&mut c2, 1.0 / d2);
                Some(pricing_forms(kernels, &c2, &mu2))
            }
            CvCriterion::PricingR2Gls => {
                let mut sigma2 = dense::gram_tn(kernels, x2.as_ref());
                scale_in_place(&mut sigma2, 1.0 / d2);
                let (vals, vecs) = dense::sym_eigen_desc(kernels, ws, sigma2.as_ref(), "held-out covariance")?;
                let lmax = vals.first().copied().unwrap_or(0.0);
                let lmin = vals.last().copied().unwrap_or(0.0);
                let condition = if lmin > 0.0 { lmax / lmin } else { f64::INFINITY };
                if t2 <= n || !(condition <= GLS_MAX_CONDITION) {
                    return Err(EstimateError::CriterionUnavailable {
                        fold: index,
                        periods: t2,
                        factors: n,
                        condition,
                    });
                }
                // Whitening W = Λ^{-1/2}U' turns the Σ₂⁻¹-weighted norm into a plain one.
                let w = Mat::from_fn(n, n, |a, b| vecs[(b, a)] / vals[a].sqrt());
                let mut c2 = dense::mul_tn(kernels, x2.as_ref(), fc.as_ref());
                scale_in_place(&mut c2, 1.0 / d2);
                let wc = dense::mul(kernels, w.as_ref(), c2.as_ref());
                let wmu: Vec<f64> = (0..n).map(|a| (0..n).map(|b| w[(a, b)] * mu2[b]).sum()).collect();
                Some(pricing_forms(kernels, &wc, &wmu))
            }
        };
        Ok(Fold { train_periods: train_rows.len(), basis, f_mean, f_cov, f_held: fc, pricing })
    }

    /// Scores of several coefficient vectors (the columns of `b`, K rows) at
    /// once: the held-out Sharpe ratio of F₂b, or the pricing R²
    /// 1 − ‖μ₂ − C₂b‖²/‖μ₂‖² expanded in the precomputed forms (KNS).
    fn score_batch(
        &self,
        kernels: Kernels,
        criterion: CvCriterion,
        b: MatRef<'_, f64>,
        annualise: f64,
        out: &mut [f64],
    ) {
        let k = b.nrows();
        let (form, linear, constant) = match (criterion, &self.pricing) {
            (CvCriterion::Sharpe, _) => (&self.f_cov, &self.f_mean, None),
            (_, Some((cmu, cc, mumu))) => (cc, cmu, Some(*mumu)),
            (_, None) => {
                out.fill(f64::NAN);
                return;
            }
        };
        let mb = dense::mul(kernels, form.as_ref().submatrix(0, 0, k, k), b);
        for (c, o) in out.iter_mut().enumerate() {
            let mut quad = 0.0;
            let mut lin = 0.0;
            for j in 0..k {
                quad += b[(j, c)] * mb[(j, c)];
                lin += linear[j] * b[(j, c)];
            }
            *o = match constant {
                None if quad > 0.0 => annualise * lin / quad.sqrt(),
                None => f64::NAN,
                Some(mumu) if mumu > 0.0 => 1.0 - (mumu - 2.0 * lin + quad).max(0.0) / mumu,
                Some(_) => f64::NAN,
            };
        }
    }
}

impl Fold {
    /// The component portfolio `b` (its first K entries) on this fold: its
    /// training variance b'Σ_F b and its centred held-out returns F₂b.
    fn held_out_sample(&self, b: &[f64]) -> HeldOutSample {
        let k = b.len();
        let sf = &self.basis.sigma_f;
        let mut train_var = 0.0;
        for i in 0..k {
            for j in 0..k {
                train_var += b[i] * sf[(i, j)] * b[j];
            }
        }
        let returns = (0..self.f_held.nrows()).map(|t| (0..k).map(|j| self.f_held[(t, j)] * b[j]).sum()).collect();
        HeldOutSample { train_var, returns, train_periods: self.train_periods }
    }
}

fn pricing_forms(kernels: Kernels, c: &Mat<f64>, mu: &[f64]) -> (Vec<f64>, Mat<f64>, f64) {
    let (n, k) = c.shape();
    let cmu = (0..k).map(|a| (0..n).map(|i| c[(i, a)] * mu[i]).sum()).collect();
    let cc = dense::gram_tn(kernels, c.as_ref());
    let mumu = mu.iter().map(|x| x * x).sum();
    (cmu, cc, mumu)
}

fn scale_in_place(m: &mut Mat<f64>, a: f64) {
    let (r, c) = m.shape();
    for j in 0..c {
        for i in 0..r {
            m[(i, j)] *= a;
        }
    }
}

/// Scores within this relative distance of the best are ties. Some scores are
/// flat in a parameter by construction (with one component the held-out
/// Sharpe ratio does not depend on κ), and rounding must not pick the winner.
pub const TIE_TOLERANCE: f64 = 1e-10;

/// The best cell of a row-major score surface with `cols` columns: the
/// highest finite score, ties (within [`TIE_TOLERANCE`]) going to the
/// smaller K (row), then the smaller κ (column).
fn select(scores: &[f64], cols: usize) -> Option<(usize, usize, f64)> {
    let best = scores.iter().copied().filter(|s| s.is_finite()).fold(f64::NEG_INFINITY, f64::max);
    if !best.is_finite() {
        return None;
    }
    let floor = best - TIE_TOLERANCE * best.abs().max(f64::MIN_POSITIVE);
    let i = scores.iter().position(|&s| s.is_finite() && s >= floor)?;
    Some((i / cols, i % cols, scores[i]))
}

/// Scores every (K, κ) on every fold, averages over folds and picks the best
/// (ties: smaller K, then smaller κ).
#[allow(clippy::too_many_arguments)]
pub(crate) fn cross_validate(
    settings: &ValidSettings,
    diagonal: bool,
    ks: &[usize],
    kappas: &[f64],
    folds: &[Fold],
    stop: &Stop,
    threads: usize,
) -> Result<CrossValidation, EstimateError> {
    let annualise = f64::from(settings.periods_per_year()).sqrt();
    let kappa_p: Vec<f64> = kappas.iter().map(|&k| settings.kappa_per_period(k)).collect();
    let criterion = settings.cv_criterion;
    let l1 = settings.l1_penalty;
    let cells = ks.len() * kappas.len();

    let score_fold = |fold: &Fold, kernels: Kernels| -> Result<(Vec<f64>, bool), EstimateError> {
        let mut path = ShrinkagePath::new(&fold.basis, diagonal, l1);
        let mut b = vec![0.0; fold.basis.len()];
        let mut out = vec![f64::NAN; cells];
        let mut limit_hit = false;
        let nk = kappas.len();
        let mut coefs = Mat::<f64>::zeros(fold.basis.len(), nk);
        for (ki, &k) in ks.iter().enumerate() {
            stop.check()?;
            let trace = fold.basis.trace_f(k);
            // The coefficients for every κ at this K, one column each, then
            // all scores from two matrix products (SIMD instead of O(K²) loops).
            for (ci, &kp) in kappa_p.iter().enumerate() {
                let gamma = kns_gamma(trace, kp, fold.train_periods);
                let info = path.solve(k, gamma, &mut b);
                limit_hit |= !info.converged;
                for j in 0..k {
                    coefs[(j, ci)] = b[j];
                }
            }
            fold.score_batch(
                kernels,
                criterion,
                coefs.as_ref().subrows(0, k),
                annualise,
                &mut out[ki * nk..(ki + 1) * nk],
            );
        }
        Ok((out, limit_hit))
    };

    // Scoring a fold costs about Σ_K K²·(κ values) multiply–adds (plus the
    // path's solves); below the kernels' parallel threshold, spawning threads
    // measured slower than scoring the folds in turn.
    let kmax = ks.iter().copied().max().unwrap_or(0) as f64;
    let work = kmax.powi(3) / 3.0 * kappas.len() as f64;
    let per_fold: Vec<Result<(Vec<f64>, bool), EstimateError>> =
        if threads <= 1 || folds.len() == 1 || work < super::dense::PARALLEL_FLOPS {
            folds.iter().map(|f| score_fold(f, Kernels::with_threads(threads))).collect()
        } else {
            // Folds on worker threads: their kernels sequential.
            let one = |f: &Fold| score_fold(f, Kernels::SEQUENTIAL);
            super::fanout::map_in_order(folds.iter().collect(), folds.len(), one).unwrap_or_else(|_| {
                vec![Err(EstimateError::Numerical { stage: "cross-validation", detail: "worker panicked".into() })]
            })
        };
    let mut sums = vec![0.0; cells];
    let mut solver_limit_hit = false;
    for res in per_fold {
        let (scores, hit) = res?;
        solver_limit_hit |= hit;
        for (s, v) in sums.iter_mut().zip(scores) {
            *s += v;
        }
    }
    let nf = folds.len() as f64;
    let scores: Vec<f64> = sums.into_iter().map(|s| s / nf).collect();

    let Some((bk, bc, best_score)) = select(&scores, kappas.len()) else {
        return Err(EstimateError::NoFiniteScore {
            reason: "every held-out portfolio had zero variance or every held-out mean was zero".into(),
        });
    };
    let (k, kappa) = (ks[bk], kappas[bc]);

    // Held-out Sharpe at the chosen point, whatever the criterion, and each
    // fold portfolio's training variance and held-out returns.
    let mut sharpe_sum = 0.0;
    let mut held_out = Vec::with_capacity(folds.len());
    for fold in folds {
        let mut path = ShrinkagePath::new(&fold.basis, diagonal, l1);
        let mut b = vec![0.0; fold.basis.len()];
        let gamma = kns_gamma(fold.basis.trace_f(k), kappa_p[bc], fold.train_periods);
        path.solve(k, gamma, &mut b);
        let mut sharpe = [f64::NAN];
        let column = Mat::from_fn(k, 1, |j, _| b[j]);
        fold.score_batch(Kernels::with_threads(threads), CvCriterion::Sharpe, column.as_ref(), annualise, &mut sharpe);
        sharpe_sum += sharpe[0];
        held_out.push(fold.held_out_sample(&b[..k]));
    }

    Ok(CrossValidation {
        surface: CvSurface { components: ks.to_vec(), kappas: kappas.to_vec(), scores, criterion, folds: folds.len() },
        k,
        kappa,
        best_score,
        held_out_sharpe: sharpe_sum / nf,
        solver_limit_hit,
        held_out,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_follow_numpy_array_split() {
        // numpy.array_split(np.arange(10), 3) -> sizes [4, 3, 3] (numpy documentation).
        assert_eq!(fold_bounds(10, 3), vec![(0, 4), (4, 7), (7, 10)]);
        assert_eq!(fold_bounds(9, 3), vec![(0, 3), (3, 6), (6, 9)]);
        assert_eq!(min_training_periods(10, 3), 6);
    }

    #[test]
    fn selection_breaks_near_ties_towards_small_k_then_small_kappa() {
        // Row-major 2 × 3 surface: the best value 1.0 appears (up to rounding) at (0, 2) and (1, 0).
        let scores = [0.5, f64::NAN, 1.0 - 1e-14, 1.0, 0.2, 0.9];
        assert_eq!(select(&scores, 3).map(|(r, c, _)| (r, c)), Some((0, 2)));
        assert_eq!(select(&[f64::NAN, f64::NAN], 2), None);
        assert_eq!(select(&[0.1, 0.3], 2).map(|(r, c, _)| (r, c)), Some((0, 1)));
    }
}
