//! Invented markets whose true means and covariances are known, drawn from
//! three families of structures that share no generator code path for their
//! spectra, premia or tails (see `Family`).

use faer::Mat;
use faer::linalg::solvers::Solve as _;
use keelson::demo::SplitMix as Rng;
use keelson::estimator::ReturnPanel;

/// Which distribution of structures a market is drawn from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Family {
    /// The tuning family: spiked or power-law spectra; premia loud, quiet,
    /// in a few factors, spread, or a mixture; Gaussian or Student-t returns.
    /// The default is chosen on this family only.
    Broad,
    /// The second tuning family (it was written as a held-out family and
    /// consulted once, so it is tuning evidence now): spectra fitted to the
    /// open dataset or built from clustered (industry-like) loadings; premia
    /// tilted by variance, quiet plus idiosyncratic, or a concentrated
    /// mixture; GARCH(1,1) or regime-switching volatility.
    Probe,
    /// The held-out family, never used to choose anything: Toeplitz
    /// (sorted-portfolio-like) or two-level hierarchical spectra; premia as
    /// many small own alphas, in the middle of the spectrum, or a sparse
    /// stochastic discount factor; Student-t GARCH or compensated crash jumps.
    Holdout,
}

impl Family {
    /// The premia designs of the family, in report order.
    pub fn designs(self) -> &'static [&'static str] {
        match self {
            Family::Broad => &["loud", "quiet", "few", "spread", "mixture"],
            Family::Probe => &["tilted", "quiet+few", "concentrated"],
            Family::Holdout => &["dense-own", "middle", "sparse-sdf"],
        }
    }
}

/// The open dataset's spectrum as a power law λ_j = e^a · j^(−α) (per-month
/// variances of the demarketed factors), fitted by least squares on logs.
#[derive(Clone, Copy, Debug)]
pub struct OpenSpectrum {
    pub log_level: f64,
    pub alpha: f64,
    /// Mean and standard deviation across factors of the annualised
    /// demarketed Sharpe ratios (reported beside the designs, not used).
    pub sharpe_mean: f64,
    pub sharpe_sd: f64,
}

/// Time variation of volatility (the unconditional covariance stays Σ).
#[derive(Clone, Copy, Debug)]
enum Tails {
    Gaussian,
    /// Multivariate Student t with ν degrees of freedom, scaled to covariance Σ.
    StudentT(u32),
    /// h_{t+1} = (1 − a − b) + a·e_t² + b·h_t driven by the loudest direction's shock (E h = 1).
    Garch {
        a: f64,
        b: f64,
    },
    /// A two-state Markov chain of volatility multipliers with E s² = 1.
    Regime {
        stay: f64,
        low: f64,
        high: f64,
    },
    /// Student-t(ν) shocks scaled by a GARCH(1,1) variance as above.
    StudentGarch {
        nu: u32,
        a: f64,
        b: f64,
    },
    /// Half the loudest direction's variance arrives as crashes of −c with
    /// probability p a period, compensated (+pc every period): mean and
    /// covariance unchanged, returns negatively skewed.
    Jumps {
        p: f64,
    },
}

impl Tails {
    fn name(self) -> &'static str {
        match self {
            Tails::Gaussian => "gaussian",
            Tails::StudentT(_) => "student-t",
            Tails::Garch { .. } => "garch",
            Tails::Regime { .. } => "regime",
            Tails::StudentGarch { .. } => "student-t garch",
            Tails::Jumps { .. } => "jumps",
        }
    }
}

/// One market: Σ = LL' with L = V·diag(√λ), μ, and its maximum Sharpe ratio per period.
pub struct Market {
    pub spectrum: &'static str,
    pub tails_name: &'static str,
    tails: Tails,
    l: Mat<f64>,
    /// For `Tails::Jumps`: the loudest eigendirection times the crash size c.
    jump: Vec<f64>,
    sigma: Mat<f64>,
    pub mu: Vec<f64>,
    pub sr_max: f64,
}

impl Market {
    pub fn factors(&self) -> usize {
        self.mu.len()
    }

    /// True efficiency (μ'w/√(w'Σw))/√(μ'Σ⁻¹μ), annualised volatility (monthly
    /// periods) and gross exposure of a weight vector.
    pub fn score(&self, w: &[f64]) -> (f64, f64, f64) {
        let sw = &self.sigma * Mat::from_fn(w.len(), 1, |i, _| w[i]);
        let var: f64 = w.iter().enumerate().map(|(i, x)| x * sw[(i, 0)]).sum();
        let mean: f64 = w.iter().zip(&self.mu).map(|(a, b)| a * b).sum();
        ((mean / var.sqrt()) / self.sr_max, (12.0 * var).sqrt(), w.iter().map(|x| x.abs()).sum())
    }

    /// A panel of `t` monthly returns.
    pub fn simulate(&self, t: usize, rng: &mut Rng) -> ReturnPanel {
        let n = self.factors();
        let z = Mat::from_fn(n, t, |_, _| rng.normal());
        let x = &self.l * &z;
        let mut h: f64 = 1.0;
        let mut high = false;
        let mut returns = Vec::with_capacity(t * n);
        for s in 0..t {
            let scale = match self.tails {
                Tails::Gaussian => 1.0,
                Tails::StudentT(nu) => {
                    let chi2: f64 = (0..nu).map(|_| rng.normal().powi(2)).sum();
                    ((f64::from(nu) - 2.0) / chi2).sqrt()
                }
                Tails::Garch { a, b } => {
                    let now = h.sqrt();
                    h = (1.0 - a - b) + a * (now * z[(0, s)]).powi(2) + b * h;
                    now
                }
                Tails::StudentGarch { nu, a, b } => {
                    let chi2: f64 = (0..nu).map(|_| rng.normal().powi(2)).sum();
                    let now = h.sqrt() * ((f64::from(nu) - 2.0) / chi2).sqrt();
                    h = (1.0 - a - b) + a * (now * z[(0, s)]).powi(2) + b * h;
                    now
                }
                Tails::Jumps { .. } => 1.0,
                Tails::Regime { stay, low, high: hi } => {
                    if rng.uniform() > stay {
                        high = !high;
                    }
                    if high { hi } else { low }
                }
            };
            // Compensated crash: −1 with probability p, then + p (mean zero).
            let jump = match self.tails {
                Tails::Jumps { p } => p - f64::from(u8::from(rng.uniform() < p)),
                _ => 0.0,
            };
            for i in 0..n {
                returns.push(self.mu[i] + scale * x[(i, s)] + jump * self.jump.get(i).copied().unwrap_or(0.0));
            }
        }
        ReturnPanel {
            factor_names: (0..n).map(|i| format!("f{i:03}")).collect(),
            period_labels: Vec::new(),
            returns,
            rows: t,
            cols: n,
            market: None,
            previous_weights: Vec::new(),
            market_name: None,
        }
    }
}

/// A random orthogonal matrix: the Q of a Gaussian matrix's QR decomposition.
fn orthogonal(n: usize, rng: &mut Rng) -> Mat<f64> {
    Mat::from_fn(n, n, |_, _| rng.normal()).qr().compute_Q()
}

fn log_uniform(lo: f64, hi: f64, rng: &mut Rng) -> f64 {
    (lo.ln() + (hi.ln() - lo.ln()) * rng.uniform()).exp()
}

fn between(lo: f64, hi: f64, rng: &mut Rng) -> f64 {
    lo + (hi - lo) * rng.uniform()
}

fn pick(n: u64, rng: &mut Rng) -> usize {
    (rng.next_u64() % n) as usize
}

/// `count` distinct indices from `from`, in random order.
fn sample(mut from: Vec<usize>, count: usize, rng: &mut Rng) -> Vec<usize> {
    for i in (1..from.len()).rev() {
        from.swap(i, pick(i as u64 + 1, rng));
    }
    from.truncate(count);
    from
}

/// Eigenvectors (columns) and variances, largest first, of a covariance.
fn eigen(sigma: &Mat<f64>) -> (Mat<f64>, Vec<f64>) {
    let n = sigma.nrows();
    let eig = sigma.self_adjoint_eigen(faer::Side::Lower).expect("a symmetric matrix");
    let (u, s) = (eig.U(), eig.S());
    // faer sorts ascending.
    let v = Mat::from_fn(n, n, |i, j| u[(i, n - 1 - j)]);
    let lambda = (0..n).map(|j| s[n - 1 - j].max(0.0)).collect();
    (v, lambda)
}

/// Σ's eigenvectors and variances (largest first) for a family, and the
/// number of loud directions.
fn spectrum(family: Family, n: usize, open: OpenSpectrum, rng: &mut Rng) -> (&'static str, Mat<f64>, Vec<f64>, usize) {
    match (family, rng.uniform() < 0.5) {
        (Family::Broad, true) => {
            let loud = 1 + pick(8, rng);
            let mut lambda: Vec<f64> = (0..n)
                .map(|j| if j < loud { between(0.03, 0.09, rng) } else { log_uniform(0.003, 0.02, rng) }.powi(2))
                .collect();
            lambda.sort_by(|a, b| b.total_cmp(a));
            ("spiked", orthogonal(n, rng), lambda, loud)
        }
        (Family::Broad, false) => {
            let alpha = between(0.8, 2.0, rng);
            let top = between(0.04, 0.08, rng);
            let lambda = (0..n).map(|j| (top * top * ((j + 1) as f64).powf(-alpha)).max(0.003f64.powi(2))).collect();
            ("power-law", orthogonal(n, rng), lambda, 5)
        }
        (Family::Probe, true) => {
            let mut lambda: Vec<f64> = (0..n)
                .map(|j| (open.log_level - open.alpha * ((j + 1) as f64).ln() + 0.2 * rng.normal()).exp())
                .collect();
            lambda.sort_by(|a, b| b.total_cmp(a));
            ("open-fitted", orthogonal(n, rng), lambda, 3)
        }
        (Family::Probe, false) => {
            // A global factor, one industry factor per group, idiosyncratic noise.
            let groups = 3 + pick(8, rng);
            let global = between(0.02, 0.05, rng);
            let group_vol: Vec<f64> = (0..groups).map(|_| between(0.02, 0.05, rng)).collect();
            let member: Vec<usize> = (0..n).map(|_| pick(groups as u64, rng)).collect();
            let beta: Vec<f64> = (0..n).map(|_| 0.7 * rng.normal()).collect();
            let load: Vec<f64> = (0..n).map(|_| between(0.5, 1.2, rng)).collect();
            let idio: Vec<f64> = (0..n).map(|_| log_uniform(0.005, 0.025, rng)).collect();
            let sigma = Mat::from_fn(n, n, |i, j| {
                let mut c = beta[i] * beta[j] * global * global;
                if member[i] == member[j] {
                    c += load[i] * load[j] * group_vol[member[i]].powi(2);
                }
                if i == j {
                    c += idio[i] * idio[i];
                }
                c
            });
            let (v, lambda) = eigen(&sigma);
            ("clustered", v, lambda, 1 + groups)
        }
        (Family::Holdout, true) => {
            // Correlation ρ^|i−j| (neighbouring sorted portfolios move together),
            // heterogeneous volatilities, and one global factor.
            let rho = between(0.3, 0.9, rng);
            let vol: Vec<f64> = (0..n).map(|_| log_uniform(0.01, 0.06, rng)).collect();
            let global = between(0.02, 0.04, rng);
            let beta: Vec<f64> = (0..n).map(|_| 0.5 * rng.normal()).collect();
            let sigma = Mat::from_fn(n, n, |i, j| {
                vol[i] * vol[j] * rho.powi(i.abs_diff(j) as i32) + beta[i] * beta[j] * global * global
            });
            let (v, lambda) = eigen(&sigma);
            ("toeplitz", v, lambda, 2)
        }
        (Family::Holdout, false) => {
            // Super-sectors, sectors within them, idiosyncratic noise.
            let supers = 2 + pick(3, rng);
            let per = 2 + pick(3, rng);
            let sectors = supers * per;
            let sector: Vec<usize> = (0..n).map(|_| pick(sectors as u64, rng)).collect();
            let super_vol: Vec<f64> = (0..supers).map(|_| between(0.02, 0.05, rng)).collect();
            let sector_vol: Vec<f64> = (0..sectors).map(|_| between(0.01, 0.03, rng)).collect();
            let a: Vec<f64> = (0..n).map(|_| between(0.6, 1.4, rng)).collect();
            let b: Vec<f64> = (0..n).map(|_| between(0.6, 1.4, rng)).collect();
            let idio: Vec<f64> = (0..n).map(|_| log_uniform(0.004, 0.03, rng)).collect();
            let sigma = Mat::from_fn(n, n, |i, j| {
                let (si, sj) = (sector[i], sector[j]);
                let mut c = 0.0;
                if si / per == sj / per {
                    c += a[i] * a[j] * super_vol[si / per].powi(2);
                }
                if si == sj {
                    c += b[i] * b[j] * sector_vol[si].powi(2);
                }
                if i == j {
                    c += idio[i] * idio[i];
                }
                c
            });
            let (v, lambda) = eigen(&sigma);
            ("hierarchical", v, lambda, supers)
        }
    }
}

/// μ with Sharpe ratio a_j ∈ [0.5, 1.5] (before scaling) along each listed eigendirection.
fn along(v: &Mat<f64>, lambda: &[f64], dirs: &[usize], rng: &mut Rng) -> Vec<f64> {
    let mut mu = vec![0.0; lambda.len()];
    for &j in dirs {
        let a = between(0.5, 1.5, rng) * lambda[j].sqrt();
        for (i, m) in mu.iter_mut().enumerate() {
            *m += v[(i, j)] * a;
        }
    }
    mu
}

/// Alphas in `count` factors' own returns, each 0.5–1.5 of the factor's volatility.
fn own(sigma: &Mat<f64>, count: usize, rng: &mut Rng) -> Vec<f64> {
    let n = sigma.nrows();
    let mut mu = vec![0.0; n];
    for i in sample((0..n).collect(), count, rng) {
        mu[i] = between(0.5, 1.5, rng) * sigma[(i, i)].sqrt();
    }
    mu
}

/// √(μ'Σ⁻¹μ) by a Cholesky solve.
fn max_sharpe(sigma: &Mat<f64>, mu: &[f64]) -> f64 {
    let n = mu.len();
    let b = Mat::from_fn(n, 1, |i, _| mu[i]);
    let x = sigma.llt(faer::Side::Lower).expect("Σ is positive definite").solve(&b);
    (0..n).map(|i| mu[i] * x[(i, 0)]).sum::<f64>().sqrt()
}

/// Σ' weights × parts, each part first scaled to a unit Sharpe ratio.
fn combine(sigma: &Mat<f64>, parts: &[Vec<f64>], shares: &[f64]) -> Vec<f64> {
    let n = sigma.nrows();
    let mut mu = vec![0.0; n];
    for (p, s) in parts.iter().zip(shares) {
        let sr = max_sharpe(sigma, p);
        for (m, x) in mu.iter_mut().zip(p) {
            *m += s.sqrt() * x / sr;
        }
    }
    mu
}

/// A Gamma(shape, 1) draw (Marsaglia & Tsang 2000; shape < 1 by the boost
/// Gamma(shape) = Gamma(shape + 1)·U^(1/shape)).
fn gamma(shape: f64, rng: &mut Rng) -> f64 {
    if shape < 1.0 {
        return gamma(shape + 1.0, rng) * rng.uniform().max(1e-300).powf(1.0 / shape);
    }
    let d = shape - 1.0 / 3.0;
    let c = 1.0 / (9.0 * d).sqrt();
    loop {
        let x = rng.normal();
        let v = (1.0 + c * x).powi(3);
        if v > 0.0 && rng.uniform().max(1e-300).ln() < 0.5 * x * x + d - d * v + d * v.ln() {
            return d * v;
        }
    }
}

/// Dirichlet(c, …, c) shares (c = 1: uniform on the simplex; c < 1: concentrated).
fn dirichlet(k: usize, c: f64, rng: &mut Rng) -> Vec<f64> {
    let g: Vec<f64> = (0..k).map(|_| gamma(c, rng)).collect();
    let s: f64 = g.iter().sum();
    g.iter().map(|x| x / s).collect()
}

/// The premia of a design, before scaling to the market's maximum Sharpe ratio.
fn premia(design: &str, sigma: &Mat<f64>, v: &Mat<f64>, lambda: &[f64], loud: usize, rng: &mut Rng) -> Vec<f64> {
    let n = lambda.len();
    let loud_dirs: Vec<usize> = (0..loud.min(n)).collect();
    let quiet = |rng: &mut Rng| sample((n / 2..n).collect(), 5, rng);
    match design {
        "loud" => along(v, lambda, &loud_dirs, rng),
        "quiet" => {
            let dirs = quiet(rng);
            along(v, lambda, &dirs, rng)
        }
        "few" => {
            let count = 1 + pick(5, rng);
            own(sigma, count, rng)
        }
        "spread" => {
            let a: Vec<f64> = (0..n).map(|_| rng.normal()).collect();
            (0..n).map(|i| (0..n).map(|j| v[(i, j)] * lambda[j].sqrt() * a[j]).sum()).collect()
        }
        "mixture" => {
            let shares = dirichlet(4, 1.0, rng);
            let parts: Vec<Vec<f64>> =
                ["loud", "quiet", "few", "spread"].iter().map(|d| premia(d, sigma, v, lambda, loud, rng)).collect();
            combine(sigma, &parts, &shares)
        }
        "tilted" => {
            // Mean in eigendirection j ∝ ±λ_j^γ: γ < ½ favours quiet directions,
            // γ = 1 is premia proportional to variance.
            let gamma = rng.uniform();
            let m: Vec<f64> = (0..n)
                .map(|j| if rng.uniform() < 0.5 { -1.0 } else { 1.0 } * lambda[j].max(1e-12).powf(gamma))
                .collect();
            (0..n).map(|i| (0..n).map(|j| v[(i, j)] * m[j]).sum()).collect()
        }
        "quiet+few" => {
            let dirs = quiet(rng);
            let parts = vec![along(v, lambda, &dirs, rng), own(sigma, 2 + pick(4, rng), rng)];
            combine(sigma, &parts, &[0.5, 0.5])
        }
        "dense-own" => {
            // Every factor's own Sharpe ratio drawn around a small positive mean.
            (0..n).map(|i| (0.25 + 0.25 * rng.normal()) * sigma[(i, i)].sqrt()).collect()
        }
        "middle" => {
            let top = 10.min(n);
            let dirs: Vec<usize> = (1.min(top)..top).collect();
            along(v, lambda, &dirs, rng)
        }
        "sparse-sdf" => {
            // μ = Σb with b non-zero in 3–8 factors: the maximum-Sharpe portfolio is sparse.
            let mut b = vec![0.0; n];
            for i in sample((0..n).collect(), 3 + pick(6, rng), rng) {
                b[i] = rng.normal() / sigma[(i, i)].sqrt();
            }
            (0..n).map(|i| (0..n).map(|j| sigma[(i, j)] * b[j]).sum()).collect()
        }
        _ => {
            let shares = dirichlet(5, 0.3, rng);
            let parts: Vec<Vec<f64>> = ["loud", "quiet", "few", "spread", "tilted"]
                .iter()
                .map(|d| premia(d, sigma, v, lambda, loud, rng))
                .collect();
            combine(sigma, &parts, &shares)
        }
    }
}

fn tails(family: Family, rng: &mut Rng) -> Tails {
    match (family, rng.uniform() < 0.5) {
        (Family::Broad, true) => Tails::Gaussian,
        (Family::Broad, false) => Tails::StudentT(4 + pick(5, rng) as u32),
        (Family::Probe, true) => {
            let a = between(0.05, 0.15, rng);
            Tails::Garch { a, b: between(0.85, 0.98, rng) - a }
        }
        (Family::Probe, false) => {
            // Multipliers 1 : r with stationary probabilities ½ : ½, E s² = 1.
            let r: f64 = between(2.0, 3.0, rng);
            let low = (2.0 / (1.0 + r * r)).sqrt();
            Tails::Regime { stay: between(0.9, 0.98, rng), low, high: r * low }
        }
        (Family::Holdout, true) => {
            let a = between(0.05, 0.15, rng);
            Tails::StudentGarch { nu: 5, a, b: between(0.85, 0.97, rng) - a }
        }
        (Family::Holdout, false) => Tails::Jumps { p: between(0.01, 0.05, rng) },
    }
}

/// Draws one market of a family: N log-uniform on [`n_min`, `n_max`], the
/// maximum Sharpe ratio uniform on 0.5–1.5 a year.
pub fn draw(
    family: Family,
    design: &'static str,
    n_min: usize,
    n_max: usize,
    open: OpenSpectrum,
    rng: &mut Rng,
) -> Market {
    let n = log_uniform(n_min as f64, n_max as f64 + 0.999, rng).floor() as usize;
    let (spectrum_name, v, lambda, loud) = spectrum(family, n, open, rng);
    let mut l = Mat::from_fn(n, n, |i, j| v[(i, j)] * lambda[j].sqrt());
    let sigma = &l * l.transpose();
    let tails = tails(family, rng);
    let mut jump = Vec::new();
    if let Tails::Jumps { p } = tails {
        // Half of λ₀ from the crashes: c²·p(1 − p) = λ₀/2.
        let c = (0.5 * lambda[0] / (p * (1.0 - p))).sqrt();
        jump = (0..n).map(|i| v[(i, 0)] * c).collect();
        for i in 0..n {
            l[(i, 0)] *= 0.5f64.sqrt();
        }
    }
    let raw = premia(design, &sigma, &v, &lambda, loud, rng);
    let target = between(0.5, 1.5, rng) / 12f64.sqrt();
    let sr = max_sharpe(&sigma, &raw);
    let mu: Vec<f64> = raw.iter().map(|m| m * target / sr).collect();
    let sr_max = max_sharpe(&sigma, &mu);
    Market { spectrum: spectrum_name, tails_name: tails.name(), tails, l, jump, sigma, mu, sr_max }
}

/// Fits the power law to the eigenvalues of a panel's sample covariance.
pub fn fit_open_spectrum(panel: &ReturnPanel) -> OpenSpectrum {
    let (t, n) = (panel.rows, panel.cols);
    let r = Mat::from_fn(t, n, |i, j| panel.returns[i * n + j]);
    let market = panel.market.as_deref();
    let m = keelson::estimator::Moments::compute(r.as_ref(), market);
    let c = &m.centered;
    let sigma = Mat::from_fn(n, n, |i, j| (0..t).map(|s| c[(s, i)] * c[(s, j)]).sum::<f64>() / (t as f64 - 1.0));
    let (_, lambda) = eigen(&sigma);
    let xs: Vec<f64> = (1..=n).map(|j| (j as f64).ln()).collect();
    let ys: Vec<f64> = lambda.iter().map(|l| l.ln()).collect();
    let (mx, my) = (xs.iter().sum::<f64>() / n as f64, ys.iter().sum::<f64>() / n as f64);
    let sxy: f64 = xs.iter().zip(&ys).map(|(x, y)| (x - mx) * (y - my)).sum();
    let sxx: f64 = xs.iter().map(|x| (x - mx).powi(2)).sum();
    let slope = sxy / sxx;
    let sr: Vec<f64> = (0..n).map(|j| 12f64.sqrt() * m.mean[j] / m.sd[j]).collect();
    let sharpe_mean = sr.iter().sum::<f64>() / n as f64;
    let sharpe_sd = (sr.iter().map(|x| (x - sharpe_mean).powi(2)).sum::<f64>() / (n as f64 - 1.0)).sqrt();
    OpenSpectrum { log_level: my - slope * mx, alpha: -slope, sharpe_mean, sharpe_sd }
}
