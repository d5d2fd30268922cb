//! Translation between the estimator's types and the `keelson.v1` protobuf
//! messages, in both directions. Every conversion destructures every field
//! of the type it reads, with no wildcard, so that a new field on either
//! side fails to compile until it is handled here.
//!
//! | module | messages |
//! |---|---|
//! | `settings` | `Settings` ⇄ [`Settings`](crate::estimator::Settings) and [`SettingsPatch`](crate::estimator::SettingsPatch), the enums |
//! | `weights` | `ComputeWeightsRequest` ⇄ [`ReturnPanel`](crate::estimator::ReturnPanel), [`WeightSet`](crate::estimator::WeightSet) → `ComputeWeightsResponse` |
//! | `backtest` | `RunBacktestRequest` → history and [`BacktestSpec`](crate::evaluate::BacktestSpec), [`BacktestResult`](crate::evaluate::BacktestResult) → `BacktestResult` |

mod backtest;
mod settings;
mod weights;

pub use backtest::{backtest_request_from_panel, backtest_request_into_parts, backtest_result_to_proto};
pub use settings::{
    patch_from_proto, patch_to_proto, scaling_to_proto, settings_from_proto, settings_to_proto, settings_to_proto_only,
};
pub use weights::{request_from_panel, request_into_parts, weight_set_to_proto};
