//! Property tests on random windows, settings and wire bytes: the estimator
//! returns an error or finite weights whose diagnostics agree with each
//! other, and nothing reachable from a request panics.

use keelson::convert::{request_into_parts, settings_from_proto};
use keelson::estimator::{self, Normalization, ReturnPanel, Settings};
use keelson::proto;
use proptest::prelude::*;
use prost::Message as _;

/// A pathological value to plant in an otherwise ordinary window.
fn oddity() -> impl Strategy<Value = f64> {
    prop_oneof![Just(f64::NAN), Just(f64::INFINITY), Just(0.0), Just(1e308), Just(1e-320), Just(-5e5), Just(3.0)]
}

fn window() -> impl Strategy<Value = ReturnPanel> {
    (1usize..140, 1usize..12, any::<bool>(), prop::bool::weighted(0.1)).prop_flat_map(
        |(rows, cols, market, odd_names)| {
            (
                proptest::collection::vec(-0.2f64..0.2, rows * cols),
                proptest::collection::vec(-0.1f64..0.1, if market { rows } else { 0 }),
                proptest::collection::vec("[a-c]{0,2}", cols),
                proptest::option::weighted(0.4, (0..rows * cols, oddity())),
            )
                .prop_map(move |(mut returns, m, names, odd)| {
                    if let Some((i, v)) = odd {
                        returns[i] = v;
                    }
                    ReturnPanel {
                        // Mostly valid unique names, sometimes empty or repeated ones.
                        factor_names: if odd_names { names } else { (0..cols).map(|i| format!("f{i}")).collect() },
                        period_labels: Vec::new(),
                        returns,
                        rows,
                        cols,
                        market: market.then_some(m),
                        previous_weights: Vec::new(),
                        market_name: None,
                    }
                })
        },
    )
}

fn settings() -> impl Strategy<Value = proto::Settings> {
    (
        0i32..6,
        proptest::option::of(0u32..40),
        proptest::option::of(prop_oneof![Just(-1.0), Just(f64::NAN), 0.001f64..20.0]),
        0i32..4,
        0i32..4,
        proptest::option::of(1u32..6),
        proptest::option::of(prop_oneof![Just(0.0), 0.0f64..0.01]),
        0i32..6,
    )
        .prop_map(|(scaling, components, kappa, cv, norm, folds, l1, method)| proto::Settings {
            scaling,
            components_choice: components.map(proto::settings::ComponentsChoice::Components),
            kappa_choice: kappa.map(proto::settings::KappaChoice::Kappa),
            cv_criterion: cv,
            normalization: norm,
            folds,
            l1_penalty: l1,
            method,
            min_periods: Some(6),
            ..Default::default()
        })
}

/// The random windows must produce real fits, not only errors.
#[test]
fn random_windows_do_produce_fits() {
    let mut runner = proptest::test_runner::TestRunner::new(ProptestConfig { cases: 200, ..ProptestConfig::default() });
    let ok = std::sync::atomic::AtomicU64::new(0);
    runner
        .run(&(window(), settings()), |(panel, ps)| {
            if let Ok(s) = settings_from_proto(&ps, &Settings::default()).and_then(|s| s.check())
                && estimator::fit(&panel, &s).is_ok()
            {
                ok.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
            }
            Ok(())
        })
        .unwrap();
    let ok = ok.into_inner();
    println!("{ok} of 200 random windows fitted");
    assert!(ok >= 20, "only {ok} of 200 random windows fitted");
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn fit_errors_or_returns_consistent_finite_weights(panel in window(), ps in settings()) {
        let Ok(s) = settings_from_proto(&ps, &Settings::default()).and_then(|s| s.check()) else { return Ok(()) };
        if let Ok(ws) = estimator::fit(&panel, &s) {
            prop_assert!(ws.factors.iter().all(|f| f.weight.is_finite() && f.risk_contribution.is_finite()));
            prop_assert!(ws.market_weight.is_finite());
            let rc: f64 = ws.factors.iter().map(|f| f.risk_contribution).sum();
            prop_assert!((rc - 1.0).abs() < 1e-8, "risk contributions sum to {}", rc);
            prop_assert!(ws.factors.iter().filter(|f| f.excluded.is_some()).all(|f| f.weight == 0.0));
            if s.normalization == Normalization::TargetVolatility {
                // SPEC §13: the target times the risk calibration's factor.
                let target = s.target_volatility * ws.diagnostics.risk_calibration.map_or(1.0, |c| c.factor);
                prop_assert!((ws.diagnostics.ex_ante_volatility - target).abs() < 1e-9 * target.max(1.0));
            }
        }
    }

    #[test]
    fn arbitrary_wire_bytes_never_panic(bytes in proptest::collection::vec(any::<u8>(), 0..400)) {
        // Wholly random bytes mostly fail to decode; `mutated_requests_reach_the_fit`
        // below counts how many damaged requests get as far as the fit.
        let _ = reach_fit(&bytes);
    }
}

/// How far a request's bytes get: not decoded, refused before the fit, or
/// fitted (an answer or a typed error); an answer's weights are finite.
#[derive(Debug, PartialEq, Eq)]
enum Reached {
    Undecoded,
    Refused,
    /// The fit answered, with finite weights.
    Answered,
    /// The fit ended with a typed error.
    FitError,
}

fn reach_fit(bytes: &[u8]) -> Reached {
    let Ok(req) = proto::ComputeWeightsRequest::decode(bytes) else { return Reached::Undecoded };
    let (panel, ps, _) = request_into_parts(req);
    if panel.returns.len() > 10_000 {
        return Reached::Refused;
    }
    let Ok(s) = settings_from_proto(&ps, &Settings::default()).and_then(|s| s.check()) else { return Reached::Refused };
    match estimator::fit(&panel, &s) {
        Ok(ws) => {
            assert!(ws.factors.iter().all(|f| f.weight.is_finite()), "an answer with non-finite weights");
            Reached::Answered
        }
        Err(_) => Reached::FitError,
    }
}

/// A valid request damaged by seeded byte flips, insertions and truncations
/// (1,000 cases): nothing panics, every answer's weights are finite, and a
/// real share of the damaged requests decodes and reaches the fit (so the
/// fuzzing exercises the estimator, not only the decoder).
#[test]
fn mutated_requests_reach_the_fit() {
    let good = keelson::convert::request_from_panel(
        &keelson::demo::synthetic_panel(3, 40, 6),
        proto::Settings::default(),
        "wire",
    )
    .encode_to_vec();
    let mut rng = 0x2545_F491_4F6C_DD1Du64;
    let mut next = move |m: usize| {
        rng ^= rng << 13;
        rng ^= rng >> 7;
        rng ^= rng << 17;
        (rng % m as u64) as usize
    };
    let (mut undecoded, mut refused, mut answered, mut failed) = (0, 0, 0, 0);
    let cases = 1_000;
    for _ in 0..cases {
        let mut bytes = good.clone();
        for _ in 0..1 + next(3) {
            let at = next(bytes.len());
            match next(4) {
                0 => bytes[at] ^= 1 << next(8),
                1 => bytes[at] = next(256) as u8,
                2 => bytes.insert(at, next(256) as u8),
                _ => bytes.truncate(at.max(1)),
            }
        }
        match reach_fit(&bytes) {
            Reached::Undecoded => undecoded += 1,
            Reached::Refused => refused += 1,
            Reached::Answered => answered += 1,
            Reached::FitError => failed += 1,
        }
    }
    let fitted = answered + failed;
    println!(
        "{cases} damaged requests: {undecoded} undecoded, {refused} refused before the fit, \
         {answered} answered, {failed} typed errors from the fit"
    );
    assert_eq!(undecoded + refused + fitted, cases);
    assert!(answered > 0, "no damaged request was answered");
    assert!(fitted * 4 >= cases, "only {fitted} of {cases} damaged requests reached the fit");
    assert!(undecoded + refused > 0, "no damage was caught before the fit");
}
