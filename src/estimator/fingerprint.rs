//! The fingerprint of a fit's input: SHA-256 over a canonical encoding of
//! the window (shape, names, labels, returns and market as little-endian
//! IEEE bits), the previous weights and the settings, so equal inputs give
//! equal fingerprints on every platform; and the one lower-case hex
//! formatter of a digest the project uses.

use sha2::{Digest as _, Sha256};

use super::settings::Settings;
use super::window::ReturnPanel;

/// SHA-256 of raw bytes, lower-case hex.
pub fn sha256_hex(bytes: &[u8]) -> String {
    hex(&Sha256::digest(bytes))
}

/// A digest as lower-case hex, two digits a byte.
pub fn hex(digest: &[u8]) -> String {
    use std::fmt::Write as _;
    digest.iter().fold(String::with_capacity(2 * digest.len()), |mut s, b| {
        let _ = write!(s, "{b:02x}");
        s
    })
}

/// Feeds `values` to `h` as little-endian IEEE bits (all NaNs alike; -0.0
/// and 0.0 stay distinct like their bits), in blocks: the same bytes as one
/// `update` per value, without the per-call overhead.
fn put_f64s(h: &mut Sha256, values: &[f64]) {
    let mut block = [0u8; 8 * 512];
    for chunk in values.chunks(512) {
        for (v, out) in chunk.iter().zip(block.chunks_exact_mut(8)) {
            let bits = if v.is_nan() { f64::NAN.to_bits() } else { v.to_bits() };
            out.copy_from_slice(&bits.to_le_bytes());
        }
        h.update(&block[..8 * chunk.len()]);
    }
}

/// Feeds the history of `panel` (shape, names, labels, returns and market as
/// little-endian IEEE bits, all NaNs alike) to `h`: the part of a
/// fingerprint that identifies the data.
pub fn hash_history(h: &mut Sha256, panel: &ReturnPanel) {
    let put_str = |h: &mut Sha256, s: &str| {
        h.update((s.len() as u64).to_le_bytes());
        h.update(s.as_bytes());
    };
    h.update((panel.rows as u64).to_le_bytes());
    h.update((panel.cols as u64).to_le_bytes());
    for n in &panel.factor_names {
        put_str(h, n);
    }
    h.update((panel.period_labels.len() as u64).to_le_bytes());
    for l in &panel.period_labels {
        put_str(h, l);
    }
    put_f64s(h, &panel.returns);
    match &panel.market {
        Some(m) => {
            h.update([1]);
            put_f64s(h, m);
        }
        None => h.update([0]),
    }
}

/// SHA-256 over a canonical encoding of the window and the settings: equal
/// inputs give equal fingerprints on every platform.
pub fn fingerprint(panel: &ReturnPanel, settings: &Settings) -> String {
    let mut h = Sha256::new();
    h.update(b"keelson-window-v1\0");
    let put_str = |h: &mut Sha256, s: &str| {
        h.update((s.len() as u64).to_le_bytes());
        h.update(s.as_bytes());
    };
    let put_f64 = |h: &mut Sha256, v: f64| {
        // All NaNs hash alike; -0.0 and 0.0 stay distinct like their bits.
        let bits = if v.is_nan() { f64::NAN.to_bits() } else { v.to_bits() };
        h.update(bits.to_le_bytes());
    };
    hash_history(&mut h, panel);
    // The market's name matters only to find the hedge among previous weights.
    if let Some(n) = panel.market_name.as_ref().filter(|_| !panel.previous_weights.is_empty()) {
        put_str(&mut h, "market_name");
        put_str(&mut h, n);
    }
    h.update((panel.previous_weights.len() as u64).to_le_bytes());
    for (n, w) in &panel.previous_weights {
        put_str(&mut h, n);
        put_f64(&mut h, *w);
    }
    let settings_json = serde_json::to_string(settings).unwrap_or_default();
    put_str(&mut h, &settings_json);
    format!("sha256:{}", hex(&h.finalize()))
}
