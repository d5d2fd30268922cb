//! Arbitrary bytes as a `ComputeWeightsRequest`: decoding, the request
//! conversion, settings validation and (for small windows) the fit must never
//! panic, and a fit that succeeds must return finite weights.
//! (`decode_backtest_request` covers `RunBacktestRequest`.)
#![no_main]

use keelson::convert::{request_into_parts, settings_from_proto};
use keelson::estimator::{self, Settings};
use keelson::proto;
use libfuzzer_sys::fuzz_target;
use prost::Message as _;

/// The fit runs only on windows this small, so each input stays fast.
const MAX_CELLS: u64 = 4_000;

fuzz_target!(|data: &[u8]| {
    let Ok(req) = proto::ComputeWeightsRequest::decode(data) else { return };
    let cells = req.returns.as_ref().map_or(0, |m| (m.rows as u64).saturating_mul(m.cols as u64).max(m.values.len() as u64));
    let (panel, proto_settings, _) = request_into_parts(req);
    let Ok(settings) = settings_from_proto(&proto_settings, &Settings::default()).and_then(|s| s.check()) else {
        return;
    };
    if cells > MAX_CELLS || settings.kappa_grid_points > 50 || settings.max_components > 50 {
        return;
    }
    if let Ok(ws) = estimator::fit(&panel, &settings) {
        assert!(ws.factors.iter().all(|f| f.weight.is_finite()), "non-finite weight");
        assert!(ws.market_weight.is_finite(), "non-finite market weight");
    }
});
