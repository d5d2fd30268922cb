//! Uncertainty of the weights (SPEC §11): the stationary bootstrap of whole
//! rows of the window (factors and market together; Politis & Romano 1994),
//! each draw refitted with the chosen K and κ (or with its own
//! cross-validation), giving per factor the 5%, 50% and 95% quantiles of its
//! weight and the share of draws with the fitted weight's sign; bagging
//! (Breiman 1996) returns the mean of the draws instead.
//!
//! Every draw has its own generator, seeded from `seed` and the draw's index,
//! and results are collected in draw order: equal seeds give equal answers
//! whatever the thread count.

use super::error::EstimateError;
pub use super::moments::quantile;
use super::options::FitOptions;
use super::output::{BootstrapReport, FactorInterval, WeightSet};
use super::settings::{Aggregate, FittedChoice, Settings, ValidSettings};
use super::window::ReturnPanel;

/// SplitMix64 (Steele, Lea & Flood 2014): small, fast, and fully reproducible.
#[derive(Clone, Debug)]
pub struct SplitMix(pub u64);

impl SplitMix {
    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform on (0, 1).
    pub fn uniform(&mut self) -> f64 {
        ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    /// Standard normal by Box–Muller.
    pub fn normal(&mut self) -> f64 {
        let (u1, u2) = (self.uniform(), self.uniform());
        (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()
    }

    /// Uniform on 0..n (n ≥ 1), by Lemire's multiply-shift (bias below 2⁻⁶⁴·n).
    pub fn below(&mut self, n: usize) -> usize {
        ((u128::from(self.next_u64()) * n as u128) >> 64) as usize
    }

    /// The generator of draw `draw` under `seed`.
    pub fn for_draw(seed: u64, draw: usize) -> SplitMix {
        let mut g = SplitMix(seed ^ 0x6B65_656C_736F_6E21);
        let base = g.next_u64();
        SplitMix(base ^ (draw as u64).wrapping_mul(0xD1B5_4A32_D192_ED03))
    }
}

/// Row indices of one stationary-bootstrap sample of `t` periods: blocks of
/// geometric length with mean `mean_block`, each starting at a uniform
/// period, wrapping around the end (Politis & Romano 1994).
pub fn stationary_indices(rng: &mut SplitMix, t: usize, mean_block: f64) -> Vec<usize> {
    let p_new = 1.0 / mean_block.max(1.0);
    let mut out = Vec::with_capacity(t);
    let mut i = rng.below(t);
    for _ in 0..t {
        out.push(i);
        i = if rng.uniform() < p_new { rng.below(t) } else { (i + 1) % t };
    }
    out
}

/// The mean block length in force: `bootstrap_block`, or ⌈T^(1/3)⌉.
pub fn mean_block(settings: &Settings, t: usize) -> f64 {
    if settings.bootstrap_block > 0.0 { settings.bootstrap_block } else { (t as f64).cbrt().ceil() }
}

/// One resampled panel: the rows `idx` of `panel`, without labels (a
/// resample has no calendar) or previous weights.
fn resample(panel: &ReturnPanel, idx: &[usize]) -> ReturnPanel {
    let c = panel.cols;
    let mut returns = Vec::with_capacity(idx.len() * c);
    for &r in idx {
        returns.extend_from_slice(&panel.returns[r * c..(r + 1) * c]);
    }
    ReturnPanel {
        factor_names: panel.factor_names.clone(),
        period_labels: Vec::new(),
        returns,
        rows: idx.len(),
        cols: c,
        market: panel.market.as_ref().map(|m| idx.iter().map(|&r| m[r]).collect()),
        previous_weights: Vec::new(),
        market_name: None,
    }
}

/// One draw's weights per panel factor and its K, or `None` when its fit failed.
type Draw = Option<(Vec<f64>, usize)>;

/// Runs the draws for the fitted `point`; returns the report and, per panel
/// factor, the mean of the draws' weights.
///
/// # Errors
/// [`EstimateError::Cancelled`] / [`EstimateError::DeadlineExceeded`] when
/// `options.stop` fires between draws, [`EstimateError::DegeneratePortfolio`]
/// when no draw gave weights.
pub fn run(
    panel: &ReturnPanel,
    settings: &ValidSettings,
    point: &WeightSet,
    options: &FitOptions,
    fit: &(dyn Fn(&ReturnPanel, &ValidSettings, &FitOptions) -> Result<WeightSet, EstimateError> + Sync),
) -> Result<(BootstrapReport, Vec<f64>), EstimateError> {
    let draws = settings.bootstrap_draws as usize;
    let d = &point.diagnostics;
    let fixed = FittedChoice { scaling: d.chosen_scaling, components: d.num_components, kappa: d.kappa };
    let s = settings.for_draw((!settings.bootstrap_cv).then_some(fixed));
    let block = mean_block(settings, panel.rows);
    let seed = settings.seed;
    // The point fit's risk calibration (SPEC §13) scales every draw alike.
    let factor = point.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
    let inner = FitOptions { threads: 1, stop: options.stop.clone(), eigen_path: options.eigen_path };
    let one = |d: usize| -> Result<Draw, EstimateError> {
        options.stop.check()?;
        let idx = stationary_indices(&mut SplitMix::for_draw(seed, d), panel.rows, block);
        match fit(&resample(panel, &idx), &s, &inner) {
            Ok(ws) => Ok(Some((ws.factors.iter().map(|f| factor * f.weight).collect(), ws.diagnostics.num_components))),
            Err(e @ (EstimateError::Cancelled | EstimateError::DeadlineExceeded)) => Err(e),
            Err(_) => Ok(None),
        }
    };
    let results = super::fanout::map_in_order((0..draws).collect(), options.threads, one).unwrap_or_else(|_| {
        vec![Err(EstimateError::Numerical { stage: "bootstrap", detail: "a draw panicked".into() })]
    });
    let mut ok = Vec::with_capacity(draws);
    let mut failed = 0;
    for r in results {
        match r? {
            Some(v) => ok.push(v),
            None => failed += 1,
        }
    }
    if ok.is_empty() {
        return Err(EstimateError::DegeneratePortfolio {
            reason: format!("none of the {draws} bootstrap draws could be fitted"),
        });
    }
    let n = panel.cols;
    let mut factors = Vec::with_capacity(n);
    let mut mean = vec![0.0; n];
    for j in 0..n {
        let mut w: Vec<f64> = ok.iter().map(|(v, _)| v[j]).collect();
        // The draws are model portfolios (no limits, no costs): compare with the model weight.
        let fitted = point.factors[j].model_weight;
        let agree = w.iter().filter(|x| x.signum() == fitted.signum() && (**x == 0.0) == (fitted == 0.0)).count();
        mean[j] = w.iter().sum::<f64>() / w.len() as f64;
        w.sort_by(f64::total_cmp);
        factors.push(FactorInterval {
            q05: quantile(&w, 0.05),
            q50: quantile(&w, 0.5),
            q95: quantile(&w, 0.95),
            sign_agreement: agree as f64 / w.len() as f64,
        });
    }
    let mut components: Vec<(usize, usize)> = Vec::new();
    if s.bootstrap_cv {
        let mut ks: Vec<usize> = ok.iter().map(|(_, k)| *k).collect();
        ks.sort_unstable();
        for k in ks {
            match components.last_mut() {
                Some((last, count)) if *last == k => *count += 1,
                _ => components.push((k, 1)),
            }
        }
    }
    let report = BootstrapReport {
        draws: ok.len(),
        failed,
        mean_block: block,
        seed,
        cross_validated: s.bootstrap_cv,
        bagged: settings.aggregate == Aggregate::Bagged,
        factors,
        components,
    };
    Ok((report, mean))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_follow_numpy_linear_interpolation() {
        // numpy.quantile([1, 2, 3, 4, 10], [0.05, 0.5, 0.95]) = [1.2, 3.0, 8.8] (type 7, by hand:
        // h = 4q; 0.2 → 1 + 0.2·1; 2 → 3; 3.8 → 4 + 0.8·6).
        let v = [1.0, 2.0, 3.0, 4.0, 10.0];
        assert!((quantile(&v, 0.05) - 1.2).abs() < 1e-12);
        assert_eq!(quantile(&v, 0.5), 3.0);
        assert!((quantile(&v, 0.95) - 8.8).abs() < 1e-12);
    }

    #[test]
    fn blocks_have_the_mean_length_asked() {
        // Block lengths are geometric with mean L (Politis & Romano 1994): count the runs.
        let mut rng = SplitMix::for_draw(7, 0);
        for l in [1.0, 4.0, 10.0] {
            let (mut runs, mut len) = (0usize, 0usize);
            for _ in 0..200 {
                let idx = stationary_indices(&mut rng, 500, l);
                runs += 1 + idx.windows(2).filter(|w| w[1] != (w[0] + 1) % 500).count();
                len += idx.len();
            }
            let mean = len as f64 / runs as f64;
            // A fresh start that happens to continue the block is not seen as a new run: 1/T bias.
            assert!((mean - l).abs() < 0.05 * l + 0.05, "mean block {mean} for L = {l}");
        }
    }
}
