//! Upper estimates of a fit's working memory, from its shape alone: what the
//! service's admission compares with `server.max_request_bytes_estimate`
//! before any work.

use super::desk::OmegaForm;
use super::settings::ValidSettings;

const F64: u64 = 8;

/// Words per cell (N × T) the implementation stage holds in the factor form
/// of Ω: the conic program's constraint matrix, the solver's KKT matrix and
/// its factor. Peak RSS measured by `examples/implementation_table.rs`, less
/// the fit's own working set: 37 words per cell at 2,000 × 120, 40 at
/// 10,000 × 120; rounded up.
const FACTOR_FORM_WORDS_PER_CELL: u64 = 48;

/// Words per N² the stage holds in the dense form of Ω: Ω itself, its upper
/// triangle in the program, the KKT matrix and its factor, with room for
/// fill (peak RSS at 200 × 600 and 500 × 600, the table's dense rows).
const DENSE_FORM_WORDS_PER_PAIR: u64 = 16;

/// Memory of a fit that does not scale with its shape: thread stacks and
/// the allocator's arenas (2.4 MiB measured at 50 × 120).
const FIT_OVERHEAD_BYTES: u64 = 4 << 20;

/// Peak working memory of the implementation stage on `factors` factors over
/// a window of `periods` periods, bytes, in the form the stage chooses.
pub fn stage_bytes(periods: usize, factors: usize) -> u64 {
    let (t, n) = (periods as u64, factors as u64);
    let words = match OmegaForm::for_shape(factors, periods) {
        OmegaForm::Dense => DENSE_FORM_WORDS_PER_PAIR * n * n + 8 * n * t,
        OmegaForm::Factor => FACTOR_FORM_WORDS_PER_CELL * n * t,
    };
    words.saturating_mul(F64)
}

/// Peak working memory of the model fit on one window (before the stage) on
/// one thread, bytes: copies of the window (validated, demarketed, scaled,
/// each fold's), the smaller of the N × N and T × T cross products and their
/// eigenvectors for the window and each fold, and a fixed overhead; the
/// bootstrap's draws (run one after another) add their weights. Fitted to
/// peak RSS from `implementation_table -- model N T` (MiB measured against
/// estimated): 24.3 / 29.6 at 2,000 × 120, 131 / 150 at 2,000 × 600,
/// 217 / 271 at 2,000 × 1,000, 47.6 / 50.2 at 500 × 600, 4.8 / 8.0 at 250 × 120.
pub fn model_bytes(periods: usize, factors: usize, settings: &ValidSettings) -> u64 {
    let (t, n) = (periods.max(1) as u64, factors as u64);
    let cross = t.min(n).pow(2);
    let words =
        27 * t * n / 2 + 2 * cross * (u64::from(settings.folds) + 1) + u64::from(settings.bootstrap_draws) * (n + 4);
    words.saturating_mul(F64).saturating_add(FIT_OVERHEAD_BYTES)
}

/// Peak working memory of one fit, bytes: the model fit, then the
/// implementation stage when the settings set a limit or a cost.
pub fn fit_bytes(periods: usize, factors: usize, settings: &ValidSettings) -> u64 {
    let stage = if settings.implementation_active() { stage_bytes(periods, factors) } else { 0 };
    model_bytes(periods, factors, settings).saturating_add(stage)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::estimator::{Cap, Settings};

    #[test]
    fn the_stage_counts_only_when_it_runs_and_grows_with_the_window() {
        let plain = Settings::default().check().unwrap();
        let limited = Settings { max_weight: Cap::At(0.1), ..Settings::default() }.check().unwrap();
        assert_eq!(fit_bytes(120, 500, &plain), model_bytes(120, 500, &plain));
        assert!(fit_bytes(120, 500, &limited) > fit_bytes(120, 500, &plain));
        // Factor form: linear in N·T (48 words a cell).
        assert_eq!(stage_bytes(120, 2_000), 48 * 240_000 * 8);
        assert!(stage_bytes(120, 4_000) == 2 * stage_bytes(120, 2_000));
        // Dense form below the crossover: quadratic in N.
        assert_eq!(OmegaForm::for_shape(100, 120), OmegaForm::Dense);
        assert_eq!(stage_bytes(120, 100), (16 * 100 * 100 + 8 * 100 * 120) * 8);
        let bagged = Settings { bootstrap_draws: 50, ..Settings::default() }.check().unwrap();
        assert_eq!(model_bytes(120, 30, &bagged) - model_bytes(120, 30, &plain), 50 * 34 * 8);
    }
}
