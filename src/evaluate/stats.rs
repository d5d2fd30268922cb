//! Performance statistics and inference for out-of-sample returns (SPEC §9):
//! Sharpe ratios with Lo (2002) standard errors, CER, drawdown, the
//! Jobson–Korkie–Memmel test, probabilistic and deflated Sharpe ratios,
//! Newey–West and heteroskedasticity-robust alpha regressions, and GRS.

use faer::Mat;
use serde::Serialize;
use statrs::distribution::{ContinuousCDF, FisherSnedecor, Normal};

/// Euler–Mascheroni constant (for the expected maximum Sharpe ratio of the DSR).
const EULER_GAMMA: f64 = 0.577_215_664_901_532_9;

/// Mean.
pub fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

/// Sample variance with divisor n − 1.
pub fn var(x: &[f64]) -> f64 {
    let m = mean(x);
    x.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (x.len() as f64 - 1.0)
}

/// Per-period Sharpe ratio mean/sd (sd with divisor n − 1); NaN when sd is 0.
pub fn sharpe(x: &[f64]) -> f64 {
    let sd = var(x).sqrt();
    if sd > 0.0 { mean(x) / sd } else { f64::NAN }
}

/// Skewness and non-excess kurtosis with population moments (divisor n), as
/// Bailey & López de Prado (2012) use them.
pub fn skew_kurt(x: &[f64]) -> (f64, f64) {
    let n = x.len() as f64;
    let m = mean(x);
    let m2 = x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / n;
    let m3 = x.iter().map(|v| (v - m).powi(3)).sum::<f64>() / n;
    let m4 = x.iter().map(|v| (v - m).powi(4)).sum::<f64>() / n;
    (m3 / m2.powf(1.5), m4 / (m2 * m2))
}

/// Default Newey–West lag ⌊4(T/100)^{2/9}⌋ (Newey & West 1994 rule, common practice).
pub fn default_nw_lag(t: usize) -> usize {
    (4.0 * (t as f64 / 100.0).powf(2.0 / 9.0)).floor() as usize
}

/// Bartlett weight 1 − j/(m+1) (Newey & West 1987).
fn bartlett(j: usize, m: usize) -> f64 {
    1.0 - j as f64 / (m as f64 + 1.0)
}

/// Lo (2002) iid standard error of the per-period Sharpe ratio: √((1 + SR²/2)/T).
pub fn sharpe_se_iid(sr: f64, t: usize) -> f64 {
    ((1.0 + sr * sr / 2.0) / t as f64).sqrt()
}

/// Lo (2002) standard error of the per-period Sharpe ratio under serial
/// correlation: the delta method on (μ, σ²) with a Newey–West (Bartlett, lag
/// `m`) long-run covariance of the moment conditions (r − μ, (r − μ)² − σ²).
pub fn sharpe_se_nw(x: &[f64], m: usize) -> f64 {
    let t = x.len();
    let mu = mean(x);
    let s2 = x.iter().map(|v| (v - mu).powi(2)).sum::<f64>() / t as f64;
    let g: Vec<[f64; 2]> = x.iter().map(|v| [v - mu, (v - mu).powi(2) - s2]).collect();
    let mut omega = [[0.0; 2]; 2];
    for j in 0..=m.min(t - 1) {
        let w = if j == 0 { 1.0 } else { bartlett(j, m) };
        let mut gamma = [[0.0; 2]; 2];
        for i in j..t {
            for a in 0..2 {
                for b in 0..2 {
                    gamma[a][b] += g[i][a] * g[i - j][b];
                }
            }
        }
        for a in 0..2 {
            for b in 0..2 {
                let v = gamma[a][b] / t as f64;
                omega[a][b] += if j == 0 { v } else { w * (v + gamma[b][a] / t as f64) };
            }
        }
    }
    let sd = s2.sqrt();
    let grad = [1.0 / sd, -mu / (2.0 * sd * s2)];
    let v: f64 = (0..2).map(|a| (0..2).map(|b| grad[a] * omega[a][b] * grad[b]).sum::<f64>()).sum();
    (v / t as f64).sqrt()
}

/// Certainty-equivalent return P·(mean − (γ/2)·var), var with divisor T − 1 (DeMiguel, Garlappi & Uppal 2009).
pub fn cer(x: &[f64], risk_aversion: f64, periods_per_year: f64) -> f64 {
    periods_per_year * (mean(x) - risk_aversion / 2.0 * var(x))
}

/// Maximum drawdown of the compounded wealth Π(1 + r): max over t of 1 − W_t / max_{s≤t} W_s.
pub fn max_drawdown(x: &[f64]) -> f64 {
    let mut wealth = 1.0f64;
    let mut peak = 1.0f64;
    let mut worst = 0.0f64;
    for r in x {
        wealth *= 1.0 + r;
        peak = peak.max(wealth);
        worst = worst.max(1.0 - wealth / peak);
    }
    worst
}

/// Jobson & Korkie (1981) test of equal Sharpe ratios with Memmel's (2003)
/// correction: z = (SR_a − SR_b)/√θ, θ = (2 − 2ρ + ½(SR_a² + SR_b² − 2 SR_a SR_b ρ²))/T,
/// per-period Sharpe ratios, ρ the correlation of the two return series.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct SharpeDifference {
    /// SR_a − SR_b, annualised.
    pub difference: f64,
    /// The z statistic.
    pub z: f64,
    /// Two-sided p-value under the normal.
    pub p_value: f64,
}

/// See [`SharpeDifference`].
pub fn jobson_korkie_memmel(a: &[f64], b: &[f64], periods_per_year: f64) -> SharpeDifference {
    let t = a.len() as f64;
    let (sa, sb) = (sharpe(a), sharpe(b));
    let (ma, mb) = (mean(a), mean(b));
    let cov = a.iter().zip(b).map(|(x, y)| (x - ma) * (y - mb)).sum::<f64>() / (t - 1.0);
    let rho = cov / (var(a) * var(b)).sqrt();
    let theta = (2.0 - 2.0 * rho + 0.5 * (sa * sa + sb * sb - 2.0 * sa * sb * rho * rho)) / t;
    let z = (sa - sb) / theta.sqrt();
    SharpeDifference { difference: periods_per_year.sqrt() * (sa - sb), z, p_value: two_sided_p(z) }
}

fn std_normal() -> Normal {
    Normal::new(0.0, 1.0).expect("the standard normal is valid")
}

/// Two-sided p-value of a standard normal statistic (NaN stays NaN).
pub fn two_sided_p(z: f64) -> f64 {
    if z.is_nan() { f64::NAN } else { 2.0 * (1.0 - std_normal().cdf(z.abs())) }
}

/// Probabilistic Sharpe ratio PSR(SR*) = Φ((SR − SR*)√(T − 1)/√(1 − γ₃SR + (γ₄ − 1)/4·SR²))
/// with per-period SR and non-excess kurtosis γ₄ (Bailey & López de Prado 2012).
pub fn probabilistic_sharpe(sr: f64, sr_star: f64, t: usize, skew: f64, kurt: f64) -> f64 {
    let denom = (1.0 - skew * sr + (kurt - 1.0) / 4.0 * sr * sr).sqrt();
    std_normal().cdf((sr - sr_star) * (t as f64 - 1.0).sqrt() / denom)
}

/// Expected maximum per-period Sharpe ratio of `trials` independent trials
/// whose Sharpe ratios have variance `var_trials` (Bailey & López de Prado 2014):
/// √V·((1 − γ)Φ⁻¹(1 − 1/N) + γΦ⁻¹(1 − 1/(N e))).
pub fn expected_max_sharpe(var_trials: f64, trials: usize) -> f64 {
    let n = trials as f64;
    let nd = std_normal();
    var_trials.sqrt()
        * ((1.0 - EULER_GAMMA) * nd.inverse_cdf(1.0 - 1.0 / n)
            + EULER_GAMMA * nd.inverse_cdf(1.0 - 1.0 / (n * std::f64::consts::E)))
}

/// Deflated Sharpe ratio: PSR at the expected maximum Sharpe ratio of the trials.
pub fn deflated_sharpe(sr: f64, t: usize, skew: f64, kurt: f64, var_trials: f64, trials: usize) -> f64 {
    probabilistic_sharpe(sr, expected_max_sharpe(var_trials, trials), t, skew, kurt)
}

/// OLS of y on [1, X] with Newey–West and heteroskedasticity-robust standard errors.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Regression {
    /// Coefficients, intercept first.
    pub coef: Vec<f64>,
    /// Newey–West (Bartlett, lag `lag`) standard errors, no small-sample correction.
    pub se_nw: Vec<f64>,
    /// White (HC0) standard errors.
    pub se_robust: Vec<f64>,
    /// R².
    pub r2: f64,
    /// Newey–West lag used.
    pub lag: usize,
}

/// OLS of `y` on a constant and the columns of `x` (rows = periods).
///
/// The Newey–West covariance is (X'X)⁻¹ S (X'X)⁻¹ with S = Σ_j w_j Σ_t e_t e_{t−j}
/// (x_t x_{t−j}' + x_{t−j} x_t') (Newey & West 1987; statsmodels `cov_type="HAC"`);
/// the robust one is HC0 (White 1980).
pub fn ols(y: &[f64], x: &[Vec<f64>], lag: usize) -> Option<Regression> {
    let t = y.len();
    let p = x.len() + 1;
    if t <= p {
        return None;
    }
    let xm = Mat::from_fn(t, p, |i, j| if j == 0 { 1.0 } else { x[j - 1][i] });
    let xtx = Mat::from_fn(p, p, |a, b| (0..t).map(|i| xm[(i, a)] * xm[(i, b)]).sum::<f64>());
    let inv = invert_spd(&xtx)?;
    let xty: Vec<f64> = (0..p).map(|a| (0..t).map(|i| xm[(i, a)] * y[i]).sum()).collect();
    let coef: Vec<f64> = (0..p).map(|a| (0..p).map(|b| inv[(a, b)] * xty[b]).sum()).collect();
    let e: Vec<f64> = (0..t).map(|i| y[i] - (0..p).map(|a| xm[(i, a)] * coef[a]).sum::<f64>()).collect();
    let ym = mean(y);
    let sst: f64 = y.iter().map(|v| (v - ym).powi(2)).sum();
    let sse: f64 = e.iter().map(|v| v * v).sum();
    let meat = |lags: usize| {
        let mut s = Mat::<f64>::zeros(p, p);
        for j in 0..=lags.min(t - 1) {
            let w = if j == 0 { 1.0 } else { bartlett(j, lags) };
            for i in j..t {
                let f = w * e[i] * e[i - j];
                for a in 0..p {
                    for b in 0..p {
                        let v = xm[(i, a)] * xm[(i - j, b)];
                        s[(a, b)] += if j == 0 { f * v } else { f * (v + xm[(i - j, a)] * xm[(i, b)]) };
                    }
                }
            }
        }
        let cov = sandwich(&inv, &s);
        (0..p).map(|a| cov[(a, a)].max(0.0).sqrt()).collect::<Vec<f64>>()
    };
    Some(Regression { coef, se_nw: meat(lag), se_robust: meat(0), r2: 1.0 - sse / sst, lag })
}

fn sandwich(bread: &Mat<f64>, meat: &Mat<f64>) -> Mat<f64> {
    let p = bread.nrows();
    let bm = Mat::from_fn(p, p, |a, b| (0..p).map(|c| bread[(a, c)] * meat[(c, b)]).sum::<f64>());
    Mat::from_fn(p, p, |a, b| (0..p).map(|c| bm[(a, c)] * bread[(c, b)]).sum::<f64>())
}

/// Inverse of a small symmetric positive definite matrix via its eigenvalues;
/// None when it is singular.
fn invert_spd(a: &Mat<f64>) -> Option<Mat<f64>> {
    let p = a.nrows();
    let eig = a.self_adjoint_eigen(faer::Side::Lower).ok()?;
    let (u, s) = (eig.U(), eig.S());
    let smax = (0..p).map(|i| s[i]).fold(0.0f64, f64::max);
    if (0..p).any(|i| !(s[i] > smax * 1e-13)) {
        return None;
    }
    Some(Mat::from_fn(p, p, |r, c| (0..p).map(|k| u[(r, k)] * u[(c, k)] / s[k]).sum::<f64>()))
}

/// Gibbons, Ross & Shanken (1989) test that the intercepts of N test assets
/// on L factors are jointly zero.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Grs {
    /// The F statistic ((T−N−L)/N)·α'Σ̂⁻¹α/(1 + f̄'Ω̂⁻¹f̄).
    pub statistic: f64,
    /// p-value from F(N, T−N−L).
    pub p_value: f64,
    /// Test assets.
    pub assets: usize,
    /// Factors.
    pub factors: usize,
    /// Periods.
    pub periods: usize,
}

/// GRS with Σ̂ (residuals) and Ω̂ (factors) divided by T, as in the original paper.
/// `assets[i]` and `factors[l]` are series over the same T periods.
pub fn grs(assets: &[Vec<f64>], factors: &[Vec<f64>]) -> Option<Grs> {
    let n = assets.len();
    let l = factors.len();
    let t = assets.first()?.len();
    if t <= n + l || n == 0 {
        return None;
    }
    let tf = t as f64;
    let mut alphas = Vec::with_capacity(n);
    let mut resid = Vec::with_capacity(n);
    for y in assets {
        let r = ols(y, factors, 0)?;
        let e: Vec<f64> =
            (0..t).map(|i| y[i] - r.coef[0] - (0..l).map(|k| r.coef[k + 1] * factors[k][i]).sum::<f64>()).collect();
        alphas.push(r.coef[0]);
        resid.push(e);
    }
    let sigma = Mat::from_fn(n, n, |a, b| (0..t).map(|i| resid[a][i] * resid[b][i]).sum::<f64>() / tf);
    let fbar: Vec<f64> = factors.iter().map(|f| mean(f)).collect();
    let omega = Mat::from_fn(l, l, |a, b| {
        (0..t).map(|i| (factors[a][i] - fbar[a]) * (factors[b][i] - fbar[b])).sum::<f64>() / tf
    });
    let si = invert_spd(&sigma)?;
    let oi = invert_spd(&omega)?;
    let q_alpha: f64 = (0..n).map(|a| (0..n).map(|b| alphas[a] * si[(a, b)] * alphas[b]).sum::<f64>()).sum();
    let q_f: f64 = (0..l).map(|a| (0..l).map(|b| fbar[a] * oi[(a, b)] * fbar[b]).sum::<f64>()).sum();
    let df2 = (t - n - l) as f64;
    let statistic = df2 / n as f64 * q_alpha / (1.0 + q_f);
    let f = FisherSnedecor::new(n as f64, df2).ok()?;
    Some(Grs { statistic, p_value: 1.0 - f.cdf(statistic), assets: n, factors: l, periods: t })
}

/// Holm (1979) step-down adjustment of p-values for multiple comparisons:
/// with p sorted ascending, p̃₍ᵢ₎ = max_{j≤i} min(1, (m − j + 1)·p₍ⱼ₎), returned
/// in the input order (NaN p-values are left out of m and stay NaN).
pub fn holm(p: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..p.len()).filter(|&i| p[i].is_finite()).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let m = order.len();
    let mut out = vec![f64::NAN; p.len()];
    let mut running = 0.0f64;
    for (j, &i) in order.iter().enumerate() {
        running = running.max(((m - j) as f64 * p[i]).min(1.0));
        out[i] = running;
    }
    out
}

/// Romano & Wolf (2005) step-down p-values for the hypotheses that `base`
/// has the Sharpe ratio of each of `others`, by the stationary bootstrap of
/// whole periods (Politis & Romano 1994; all series resampled together).
///
/// Statistics are studentised by each pair's Jobson–Korkie–Memmel standard
/// error on the sample; in each draw the centred statistics
/// |(d*ⱼ − dⱼ)/seⱼ| are formed, and the hypothesis with the i-th largest
/// |tⱼ| gets the share of draws whose maximum over the hypotheses not yet
/// rejected (the i-th and smaller) reaches |tⱼ|, made monotone. Deterministic
/// for a seed.
pub fn romano_wolf(base: &[f64], others: &[&[f64]], draws: usize, mean_block: f64, seed: u64) -> Vec<f64> {
    use crate::estimator::bootstrap::{SplitMix, stationary_indices};
    let t = base.len();
    let m = others.len();
    let se = |a: &[f64], b: &[f64]| -> (f64, f64) {
        let jkm = jobson_korkie_memmel(a, b, 1.0);
        (jkm.difference, if jkm.z != 0.0 && jkm.z.is_finite() { jkm.difference / jkm.z } else { f64::NAN })
    };
    let sample: Vec<(f64, f64)> = others.iter().map(|o| se(base, o)).collect();
    let stat: Vec<f64> = sample.iter().map(|(d, s)| (d / s).abs()).collect();
    if t < 3 || m == 0 || draws == 0 {
        return vec![f64::NAN; m];
    }
    // Per draw, the centred statistic of every hypothesis.
    let mut boot = vec![0.0; draws * m];
    let mut resampled = vec![0.0; t];
    let mut other_resampled = vec![0.0; t];
    for d in 0..draws {
        let idx = stationary_indices(&mut SplitMix::for_draw(seed, d), t, mean_block);
        for (r, &i) in resampled.iter_mut().zip(&idx) {
            *r = base[i];
        }
        let sr_base = sharpe(&resampled);
        for (j, o) in others.iter().enumerate() {
            for (r, &i) in other_resampled.iter_mut().zip(&idx) {
                *r = o[i];
            }
            let (diff, scale) = sample[j];
            boot[d * m + j] = ((sr_base - sharpe(&other_resampled) - diff) / scale).abs();
        }
    }
    let mut order: Vec<usize> = (0..m).filter(|&j| stat[j].is_finite()).collect();
    order.sort_by(|&a, &b| stat[b].total_cmp(&stat[a]));
    let mut out = vec![f64::NAN; m];
    let mut running = 0.0f64;
    for (step, &j) in order.iter().enumerate() {
        let remaining = &order[step..];
        let exceed = (0..draws)
            .filter(|&d| {
                remaining.iter().map(|&h| boot[d * m + h]).filter(|v| v.is_finite()).fold(0.0, f64::max) >= stat[j]
            })
            .count();
        running = running.max(exceed as f64 / draws as f64);
        out[j] = running;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn deflated_sharpe_worked_example() {
        // Bailey & López de Prado (2014) example, as recalled in SPEC §12 and recomputed:
        // 100 trials, variance of (annualised) trial Sharpe ratios 0.5, annual SR 2.5 over
        // 1,250 daily returns at 250 per year, skewness −3, kurtosis 10 → DSR ≈ 0.9004.
        let p = 250.0f64;
        let sr = 2.5 / p.sqrt();
        let dsr = deflated_sharpe(sr, 1250, -3.0, 10.0, 0.5 / p, 100);
        assert!((dsr - 0.9004).abs() < 5e-5, "DSR = {dsr}");
    }

    #[test]
    fn holm_adjusts_by_the_step_down_formula() {
        // Holm (1979): sorted 0.005, 0.01, 0.03, 0.04 → ×4, ×3, ×2, ×1, made monotone:
        // 0.02, 0.03, 0.06, max(0.04, 0.06) = 0.06 (statsmodels multipletests(method="holm") agrees).
        let got = holm(&[0.01, 0.04, 0.03, 0.005, f64::NAN]);
        let want = [0.03, 0.06, 0.06, 0.02];
        for (g, w) in got.iter().zip(want) {
            assert!((g - w).abs() < 1e-15, "{got:?}");
        }
        assert!(got[4].is_nan());
        assert_eq!(holm(&[0.9, 0.8]), vec![1.0, 1.0]);
    }

    #[test]
    fn romano_wolf_separates_a_real_difference_from_noise() {
        let mut rng = crate::estimator::bootstrap::SplitMix(5);
        let t = 600;
        let base: Vec<f64> = (0..t).map(|_| 0.01 + 0.02 * rng.normal()).collect();
        // The same premium with other noise, and one with none.
        let twin: Vec<f64> = (0..t).map(|_| 0.01 + 0.02 * rng.normal()).collect();
        let dud: Vec<f64> = (0..t).map(|_| 0.02 * rng.normal()).collect();
        let p = romano_wolf(&base, &[&twin, &dud], 400, 4.0, 1);
        assert!(p[1] < 0.01, "{p:?}");
        assert!(p[0] > 0.05, "{p:?}");
        assert_eq!(p, romano_wolf(&base, &[&twin, &dud], 400, 4.0, 1), "deterministic for a seed");
        // Step-down: the larger |t| never gets the larger adjusted p-value.
        let z = |o: &[f64]| jobson_korkie_memmel(&base, o, 1.0).z.abs();
        assert!(z(&dud) > z(&twin) && p[1] <= p[0]);
    }

    #[test]
    fn lo_iid_standard_error_formula() {
        // Lo (2002), eq. (9): SE = √((1 + SR²/2)/T); SR = 0.2, T = 100 → √(1.02/100).
        assert!((sharpe_se_iid(0.2, 100) - (1.02f64 / 100.0).sqrt()).abs() < 1e-15);
    }

    #[test]
    fn drawdown_by_hand() {
        // Wealth 1.1, 0.88, 0.968: peak 1.1, trough 0.88 → drawdown 0.2.
        assert!((max_drawdown(&[0.1, -0.2, 0.1]) - 0.2).abs() < 1e-12);
    }

    #[test]
    fn newey_west_lag_rule() {
        // ⌊4(T/100)^{2/9}⌋: T = 100 → 4; T = 500 → 5.
        assert_eq!(default_nw_lag(100), 4);
        assert_eq!(default_nw_lag(500), 5);
    }
}
