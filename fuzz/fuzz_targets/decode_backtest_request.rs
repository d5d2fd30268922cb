//! Arbitrary bytes as a `RunBacktestRequest`: decoding, the conversion, the
//! settings and specification checks and the budget estimate must never
//! panic; a specification that passes must be within its own bounds, and
//! (for small budgets) the backtest must run to an error or a finite result.
#![no_main]

use keelson::convert::{backtest_request_into_parts, settings_from_proto};
use keelson::estimator::{Settings, Stop};
use keelson::evaluate;
use keelson::proto;
use libfuzzer_sys::fuzz_target;
use prost::Message as _;

/// The backtest runs only when it is this small, so each input stays fast.
const MAX_FITS: u64 = 40;
const MAX_CELLS: usize = 2_000;

fuzz_target!(|data: &[u8]| {
    let Ok(req) = proto::RunBacktestRequest::decode(data) else { return };
    let (panel, proto_settings, spec, _) = backtest_request_into_parts(req);
    let Ok(settings) = settings_from_proto(&proto_settings, &Settings::default()).and_then(|s| s.check()) else {
        return;
    };
    let Ok(spec) = spec.check(&panel, &settings) else { return };
    let budget = spec.budget();
    assert!(spec.window < panel.rows && spec.step >= 1 && spec.step <= panel.rows - spec.window, "bounds");
    assert!(spec.sweep_max_k() <= settings.max_components as usize, "sweep bound");
    assert!(budget.refits >= 1 && budget.fits >= budget.refits, "budget {budget:?}");
    if budget.fits > MAX_FITS || panel.returns.len() > MAX_CELLS || settings.max_components > 20 {
        return;
    }
    if settings.kappa_grid_points > 20 {
        return;
    }
    if let Ok(r) = evaluate::run(&panel, &settings, &spec, &|_| {}, &Stop::never()) {
        assert_eq!(r.refits as u64, budget.refits, "refits as estimated");
        assert!(r.strategies[0].returns.iter().all(|v| v.is_finite()), "non-finite out-of-sample return");
    }
});
