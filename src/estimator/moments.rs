//! Demarketing and sample moments of a block of periods (SPEC §2–3).

use faer::{Mat, MatRef};

use super::dense::Kernels;

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
    /// The parallelism the kernels on these moments may use (the fit's).
    pub(crate) kernels: Kernels,
}

impl Moments {
    /// β_i = cov(r_i, m)/var(m) on this block, r̃ = r − β m, then μ, σ
    /// and the centred panel (SPEC §2–3).
    pub fn compute(r: MatRef<'_, f64>, market: Option<&[f64]>) -> Moments {
        Moments::compute_with(r, market, Kernels::SEQUENTIAL)
    }

    /// [`Moments::compute`] with the fit's kernels, which the stages that
    /// take these moments use too.
    pub(crate) fn compute_with(r: MatRef<'_, f64>, market: Option<&[f64]>, kernels: Kernels) -> Moments {
        let (t, n) = r.shape();
        let tf = t as f64;
        let market = market.map(|m| {
            let (centred, ss) = centred(m);
            (m, centred, ss)
        });
        // A copy of the block (no zero fill first), then each column in place:
        // β = cov(r, m)/var(m) (Σ r·(m − m̄) equals Σ (r − r̄)(m − m̄)), then
        // r − βm, its mean and the centred column. The sums run in four lanes
        // (see `sum`). Columns are independent: a large block is split into
        // column ranges over the fit's threads with the same results.
        let mut centered = r.to_owned();
        let one_column = |out: &mut [f64]| -> (f64, f64, f64) {
            let mut b = 0.0;
            if let Some((m, mc, m_ss)) = &market {
                b = dot(out, mc) / m_ss;
                for (o, v) in out.iter_mut().zip(m.iter()) {
                    *o -= b * v;
                }
            }
            let mu = sum(out) / tf;
            for o in out.iter_mut() {
                *o -= mu;
            }
            (b, mu, (dot(out, out) / (tf - 1.0)).sqrt())
        };
        let parts = kernels.threads().clamp(1, n.max(1));
        let per = n.div_ceil(parts).max(1);
        let mut ranges = Vec::with_capacity(parts);
        let mut rest = centered.as_mut();
        while rest.ncols() > 0 {
            let at = per.min(rest.ncols());
            let (head, tail) = rest.split_at_col_mut(at);
            ranges.push(head);
            rest = tail;
        }
        let stats = kernels.for_parts(ranges, 6.0 * (t * n) as f64, |mut block| {
            (0..block.ncols())
                .map(|j| match block.as_mut().col_mut(j).try_as_col_major_mut() {
                    Some(c) => one_column(c.as_slice_mut()),
                    None => (0.0, 0.0, 0.0),
                })
                .collect::<Vec<_>>()
        });
        let (mut beta, mut mean, mut sd) = (Vec::with_capacity(n), Vec::with_capacity(n), Vec::with_capacity(n));
        for (b, mu, s) in stats.into_iter().flatten() {
            beta.push(b);
            mean.push(mu);
            sd.push(s);
        }
        Moments { beta, mean, sd, centered, kernels }
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
            for (o, x) in out.iter_mut().zip(self.column(j)) {
                *o += x * wj;
            }
        }
        out
    }

    /// Column `j` of the centred panel.
    pub fn column(&self, j: usize) -> &[f64] {
        column(&self.centered, j)
    }

    /// Exponentially weighted variance of the portfolio with weights `w`:
    /// Σ_t a_t (y_t − ȳ_a)², y = X_c w, a_t ∝ 2^(−age/h) with the latest
    /// period at age 0, Σa_t = 1, ȳ_a = Σ a_t y_t (an exponentially weighted moving average with decay λ = 2^(−1/h):
    /// the integrated GARCH(1,1) without intercept of Engle & Bollerslev 1986; SPEC §10).
    pub fn portfolio_variance_ew(&self, w: &[f64], halflife: f64) -> f64 {
        let y = self.portfolio_centered(w);
        let t = y.len();
        let a: Vec<f64> = (0..t).map(|i| (-((t - 1 - i) as f64) / halflife).exp2()).collect();
        let total: f64 = a.iter().sum();
        let mean = a.iter().zip(&y).map(|(a, y)| a * y).sum::<f64>() / total;
        a.iter().zip(&y).map(|(a, y)| a * (y - mean) * (y - mean)).sum::<f64>() / total
    }

    /// Σw = X_c'(X_c w)/(T−1).
    pub fn sigma_times(&self, w: &[f64]) -> Vec<f64> {
        let x = self.portfolio_centered(w);
        let d = self.periods() as f64 - 1.0;
        (0..self.centered.ncols()).map(|j| dot(self.column(j), &x) / d).collect()
    }
}

/// Column `j` of a column-major matrix as a slice.
pub(crate) fn column(m: &Mat<f64>, j: usize) -> &[f64] {
    m.col(j).try_as_col_major().map_or(&[], |c| c.as_slice())
}

/// `x` minus its mean, and the sum of squares of that: the market's part of
/// every cov(r, m)/var(m).
pub(crate) fn centred(x: &[f64]) -> (Vec<f64>, f64) {
    let mean = sum(x) / x.len() as f64;
    let c: Vec<f64> = x.iter().map(|v| v - mean).collect();
    let ss = dot(&c, &c);
    (c, ss)
}

/// Σ x in four interleaved partial sums (lanes the compiler vectorises),
/// added pairwise at the end: a fixed order, so the result is reproducible,
/// and about as accurate as the plain loop (Higham 2002, §4.2).
pub(crate) fn sum(x: &[f64]) -> f64 {
    let mut acc = [0.0f64; 4];
    let chunks = x.chunks_exact(4);
    let rest = chunks.remainder();
    for c in chunks {
        for k in 0..4 {
            acc[k] += c[k];
        }
    }
    let tail: f64 = rest.iter().sum();
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

/// Σ xᵢyᵢ in four interleaved partial sums, as [`sum`].
pub(crate) fn dot(x: &[f64], y: &[f64]) -> f64 {
    let n = x.len().min(y.len());
    let (x, y) = (&x[..n], &y[..n]);
    let mut acc = [0.0f64; 4];
    let (xc, yc) = (x.chunks_exact(4), y.chunks_exact(4));
    let tail: f64 = xc.remainder().iter().zip(yc.remainder()).map(|(a, b)| a * b).sum();
    for (a, b) in xc.zip(yc) {
        for k in 0..4 {
            acc[k] += a[k] * b[k];
        }
    }
    (acc[0] + acc[1]) + (acc[2] + acc[3]) + tail
}

/// r̃ = r − m β' (a copy of `r` when there is no market).
pub fn demarket(r: MatRef<'_, f64>, market: Option<&[f64]>, beta: &[f64]) -> Mat<f64> {
    match market {
        Some(m) => Mat::from_fn(r.nrows(), r.ncols(), |i, j| r[(i, j)] - beta[j] * m[i]),
        None => r.to_owned(),
    }
}

/// The q-quantile of sorted values with linear interpolation between order
/// statistics (numpy's default, Hyndman & Fan type 7).
pub fn quantile(sorted: &[f64], q: f64) -> f64 {
    match sorted.len() {
        0 => f64::NAN,
        1 => sorted[0],
        n => {
            let h = (n - 1) as f64 * q;
            let lo = h.floor() as usize;
            let hi = (lo + 1).min(n - 1);
            sorted[lo] + (h - lo as f64) * (sorted[hi] - sorted[lo])
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Four periods, two factors; the first factor is the market itself.
    fn block() -> (Mat<f64>, Vec<f64>) {
        let r = Mat::from_fn(4, 2, |i, j| 0.01 * [[1.0, 2.0], [2.0, 1.0], [3.0, 5.0], [4.0, 3.0]][i][j]);
        (r, vec![0.01, 0.02, 0.03, 0.04])
    }

    #[test]
    fn beta_is_the_ols_slope_and_sd_uses_t_minus_one() {
        let (r, m) = block();
        // Hand computation with the textbook OLS slope cov(r, m)/var(m):
        // column 2 in hundredths is (2, 1, 5, 3), mean 2.75; m in hundredths (1, 2, 3, 4), mean 2.5;
        // cov = 3.5/3, var = 5/3, slope 0.7.
        let mom = Moments::compute(r.as_ref(), Some(&m));
        assert!((mom.beta[0] - 1.0).abs() < 1e-12);
        assert!((mom.beta[1] - 0.7).abs() < 1e-12);
        // The market itself demarkets to nothing.
        assert!(mom.sd[0] < 1e-15 && mom.mean[0].abs() < 1e-15);
        // r − 0.7 m in hundredths: (1.3, −0.4, 2.9, 0.2): mean 1.0, deviations (0.3, −1.4, 1.9, −0.8), sample variance (ddof = 1) 6.3/3 = 2.1.
        assert!((mom.mean[1] - 0.01).abs() < 1e-14);
        assert!((mom.sd[1] - 0.01 * 2.1f64.sqrt()).abs() < 1e-14);
        // Without a market nothing is removed: the sample sd of (1, 2, 3, 4)/100 is sqrt(5/3)/100.
        let raw = Moments::compute(r.as_ref(), None);
        assert_eq!(raw.beta, vec![0.0, 0.0]);
        assert!((raw.sd[0] - 0.01 * (5.0f64 / 3.0).sqrt()).abs() < 1e-15);
    }

    #[test]
    fn portfolio_variance_is_the_sample_variance_of_the_portfolio() {
        let (r, m) = block();
        let mom = Moments::compute(r.as_ref(), Some(&m));
        let w = [0.3, -1.2];
        let series = mom.portfolio_centered(&w);
        let var = series.iter().map(|x| x * x).sum::<f64>() / 3.0;
        assert!((mom.portfolio_variance(&w) - var).abs() < 1e-18);
        let sw = mom.sigma_times(&w);
        let quad: f64 = w.iter().zip(&sw).map(|(a, b)| a * b).sum();
        assert!((quad - var).abs() < 1e-18, "w'Σw from Σw agrees");
        assert_eq!(mom.periods(), 4);
    }

    #[test]
    fn ewma_variance_follows_its_definition() {
        let (r, m) = block();
        let mom = Moments::compute(r.as_ref(), Some(&m));
        let w = [0.0, 1.0];
        // Hand computation, half-life 1: weights ∝ (1/8, 1/4, 1/2, 1), sum 15/8;
        // deviations of factor 2 in hundredths (0.3, −1.4, 1.9, −0.8) (see above).
        let a = [1.0 / 15.0, 2.0 / 15.0, 4.0 / 15.0, 8.0 / 15.0];
        let y = [0.003, -0.014, 0.019, -0.008];
        let mean: f64 = a.iter().zip(&y).map(|(a, y)| a * y).sum();
        let want: f64 = a.iter().zip(&y).map(|(a, y)| a * (y - mean).powi(2)).sum();
        assert!((mom.portfolio_variance_ew(&w, 1.0) - want).abs() < 1e-18);
        // A very long half-life gives equal weights: the variance with divisor T.
        let flat = mom.portfolio_variance(&w) * 3.0 / 4.0;
        assert!((mom.portfolio_variance_ew(&w, 1e12) - flat).abs() < 1e-9 * flat);
    }
}
