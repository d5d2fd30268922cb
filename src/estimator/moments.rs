//! Demarketing and sample moments of a block of periods (SPEC §2–3).

use faer::{Mat, MatRef};

use super::window::ols_beta;

/// Demarketed moments of one block of periods (a whole window or a training fold).
#[derive(Clone, Debug)]
pub struct Moments {
    /// Market beta of each factor on this block (0 without demarketing).
    pub beta: Vec<f64>,
    /// Mean of each demarketed factor.
    pub mean: Vec<f64>,
    /// Sample standard deviation (divisor T−1) of each demarketed factor.
    pub sd: Vec<f64>,
    /// Demarketed returns minus their means, T × n.
    pub centered: Mat<f64>,
}

impl Moments {
    /// β_i = cov(r_i, m)/var(m) on this block, r̃ = r − β m, then μ, σ
    /// and the centred panel (SPEC §2–3).
    pub fn compute(r: MatRef<'_, f64>, market: Option<&[f64]>) -> Moments {
        let (t, n) = r.shape();
        let beta: Vec<f64> = match market {
            Some(m) => (0..n)
                .map(|j| {
                    let col: Vec<f64> = (0..t).map(|i| r[(i, j)]).collect();
                    ols_beta(&col, m)
                })
                .collect(),
            None => vec![0.0; n],
        };
        let mut centered = demarket(r, market, &beta);
        let mut mean = vec![0.0; n];
        let mut sd = vec![0.0; n];
        for j in 0..n {
            let mu = (0..t).map(|i| centered[(i, j)]).sum::<f64>() / t as f64;
            let mut ss = 0.0;
            for i in 0..t {
                let d = centered[(i, j)] - mu;
                centered[(i, j)] = d;
                ss += d * d;
            }
            mean[j] = mu;
            sd[j] = (ss / (t as f64 - 1.0)).sqrt();
        }
        Moments { beta, mean, sd, centered }
    }

    /// Number of periods in the block.
    pub fn periods(&self) -> usize {
        self.centered.nrows()
    }

    /// Per-period Sharpe ratio μ/σ of factor `j` (0 when σ is 0).
    pub fn sharpe(&self, j: usize) -> f64 {
        if self.sd[j] > 0.0 { self.mean[j] / self.sd[j] } else { 0.0 }
    }

    /// Sample variance (divisor T−1) of the portfolio with weights `w`:
    /// ‖X_c w‖²/(T−1) without forming Σ.
    pub fn portfolio_variance(&self, w: &[f64]) -> f64 {
        let x = self.portfolio_centered(w);
        x.iter().map(|v| v * v).sum::<f64>() / (self.periods() as f64 - 1.0)
    }

    /// X_c w: the centred portfolio return in every period.
    pub fn portfolio_centered(&self, w: &[f64]) -> Vec<f64> {
        let (t, n) = self.centered.shape();
        let mut out = vec![0.0; t];
        for j in 0..n {
            let wj = w[j];
            if wj == 0.0 {
                continue;
            }
            for (i, o) in out.iter_mut().enumerate() {
                *o += self.centered[(i, j)] * wj;
            }
        }
        out
    }

    /// Σw = X_c'(X_c w)/(T−1).
    pub fn sigma_times(&self, w: &[f64]) -> Vec<f64> {
        let x = self.portfolio_centered(w);
        let (t, n) = self.centered.shape();
        let d = t as f64 - 1.0;
        (0..n).map(|j| (0..t).map(|i| self.centered[(i, j)] * x[i]).sum::<f64>() / d).collect()
    }
}

/// r̃ = r − m β' (a copy of `r` when there is no market).
pub fn demarket(r: MatRef<'_, f64>, market: Option<&[f64]>, beta: &[f64]) -> Mat<f64> {
    match market {
        Some(m) => Mat::from_fn(r.nrows(), r.ncols(), |i, j| r[(i, j)] - beta[j] * m[i]),
        None => r.to_owned(),
    }
}
