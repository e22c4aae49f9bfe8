//! Rotary position embeddings: the inverse frequencies of every `rope_type` and the rotation
//! of one head, as transformers computes them (docs/model-formats.md §2.2–§2.3; transformers
//! 5.24 `modeling_rope_utils.py` and `modeling_llama.py` `rotate_half`).
//!
//! The frequencies are computed in f32 where transformers computes them on f32 tensors and in
//! f64 where it uses Python floats, so the angles, and the logits after them, match its own.

use crate::model::config::{RopeScaling, RopeSpec};

/// rotate_half RoPE on the first 2·cos.len() channels of one head.
#[inline]
pub fn rope_in_place(x: &mut [f32], cos: &[f32], sin: &[f32]) {
    let half = cos.len();
    let (a, rest) = x.split_at_mut(half);
    let b = &mut rest[..half];
    for i in 0..half {
        let (x1, x2) = (a[i], b[i]);
        a[i] = x1 * cos[i] - x2 * sin[i];
        b[i] = x2 * cos[i] + x1 * sin[i];
    }
}

/// Default-rule inverse frequencies `1.0 / (θ ** (arange(0, d, 2).float() / d))` in f32.
fn default_inv_freq(r: &RopeSpec) -> Vec<f32> {
    let d = r.rotary_dim;
    let theta = r.theta as f32;
    (0..d / 2)
        .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
        .collect()
}

/// Inverse frequencies and attention scaling (the cos/sin multiplier) for a forward call whose
/// longest position is `seq_len − 1` (docs/model-formats.md §2.3; transformers 5.24
/// `modeling_rope_utils.py` `ROPE_INIT_FUNCTIONS`).
pub fn rope_frequencies(r: &RopeSpec, seq_len: f64) -> (Vec<f32>, f32) {
    let d = r.rotary_dim as f64;
    let base = &default_inv_freq(r);
    let max_pos = r.max_position_embeddings as f64;
    match &r.scaling {
        RopeScaling::Default => (base.clone(), 1.0),
        RopeScaling::Linear { factor } => (base.iter().map(|&b| b / *factor as f32).collect(), 1.0),
        RopeScaling::Dynamic { factor } => {
            if seq_len <= max_pos {
                return (base.clone(), 1.0);
            }
            let theta =
                r.theta * ((factor * seq_len / max_pos) - (factor - 1.0)).powf(d / (d - 2.0));
            let theta = theta as f32;
            (
                (0..r.rotary_dim / 2)
                    .map(|i| 1.0f32 / theta.powf((2 * i) as f32 / d as f32))
                    .collect(),
                1.0,
            )
        }
        RopeScaling::Llama3 {
            factor,
            low_freq_factor,
            high_freq_factor,
            original_max,
        } => {
            // f32 throughout, as `_compute_llama3_parameters` runs on f32 tensors.
            let (f, lo, hi, o) = (
                *factor as f32,
                *low_freq_factor as f32,
                *high_freq_factor as f32,
                *original_max as f32,
            );
            let (low_wl, high_wl) = (o / lo, o / hi);
            let inv = base
                .iter()
                .map(|&b| {
                    let wl = 2.0 * std::f32::consts::PI / b;
                    if wl < high_wl {
                        b
                    } else if wl > low_wl {
                        b / f
                    } else {
                        let s = (o / wl - lo) / (hi - lo);
                        (1.0 - s) * b / f + s * b
                    }
                })
                .collect();
            (inv, 1.0)
        }
        RopeScaling::Yarn {
            factor,
            original_max,
            beta_fast,
            beta_slow,
            truncate,
            attention_scaling,
        } => {
            // The correction range in f64 (Python floats), the frequencies in f32 tensors.
            let corr = |n: f64| {
                d * (original_max / (n * 2.0 * std::f64::consts::PI)).ln() / (2.0 * r.theta.ln())
            };
            let (mut low, mut high) = (corr(*beta_fast), corr(*beta_slow));
            if *truncate {
                low = low.floor();
                high = high.ceil();
            }
            let low = low.max(0.0);
            let high = high.min(d - 1.0);
            let high = if low == high { high + 0.001 } else { high };
            let theta = r.theta as f32;
            let f = *factor as f32;
            let inv = (0..r.rotary_dim / 2)
                .map(|i| {
                    let pos = theta.powf((2 * i) as f32 / d as f32);
                    let extra = 1.0 / pos;
                    let inter = 1.0 / (f * pos);
                    let ramp =
                        ((i as f32 - low as f32) / (high as f32 - low as f32)).clamp(0.0, 1.0);
                    let e = 1.0 - ramp;
                    inter * (1.0 - e) + extra * e
                })
                .collect();
            (inv, *attention_scaling as f32)
        }
        RopeScaling::LongRope {
            short_factor,
            long_factor,
            original_max,
            attention_scaling,
        } => {
            let ext = if seq_len > *original_max {
                long_factor
            } else {
                short_factor
            };
            let theta = r.theta as f32;
            let inv = ext
                .iter()
                .enumerate()
                .map(|(i, &e)| 1.0f32 / (e as f32 * theta.powf((2 * i) as f32 / d as f32)))
                .collect();
            (inv, *attention_scaling as f32)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::config::ModelSpec;
    use std::path::Path;

    /// inv_freq and attention scaling for every rope_type against transformers 5.24.0
    /// `ROPE_INIT_FUNCTIONS` (tests/fixtures/rope/cases.json, made by
    /// tests/reference/make_rope_fixtures.py). Relative tolerance 1e-6: both sides are f32.
    #[test]
    fn rope_frequencies_match_transformers() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/rope/cases.json");
        let doc: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
        let cases = doc["cases"].as_array().unwrap();
        assert!(cases.len() >= 10);
        for c in cases {
            let label = format!("{} seq_len {}", c["name"], c["seq_len"]);
            let spec =
                ModelSpec::from_json(Path::new("config.json"), c["config"].as_object().unwrap())
                    .unwrap();
            let (inv, scale) = rope_frequencies(&spec.rope, c["seq_len"].as_f64().unwrap());
            let want: Vec<f32> = c["inv_freq"]
                .as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap() as f32)
                .collect();
            assert_eq!(inv.len(), want.len(), "{label}");
            for (i, (a, b)) in inv.iter().zip(&want).enumerate() {
                assert!(
                    (a - b).abs() <= 1e-6 * b.abs().max(1e-30),
                    "{label}: inv_freq[{i}] {a} vs {b}"
                );
            }
            let ws = c["attention_scaling"].as_f64().unwrap() as f32;
            assert!(
                (scale - ws).abs() <= 1e-6,
                "{label}: scaling {scale} vs {ws}"
            );
        }
    }

    /// rotate_half (transformers `apply_rotary_pos_emb`): out = x·cos + rotate_half(x)·sin with
    /// rotate_half(x) = [−x₂, x₁].
    #[test]
    fn rope_rotates_halves() {
        let mut x = [1.0, 2.0, 3.0, 4.0];
        let (c, s) = ([0.5, 0.25], [2.0, 3.0]);
        rope_in_place(&mut x, &c, &s);
        assert_eq!(
            x,
            [
                1.0 * 0.5 - 3.0 * 2.0,
                2.0 * 0.25 - 4.0 * 3.0,
                3.0 * 0.5 + 2.0,
                4.0 * 0.25 + 6.0
            ]
        );
    }
}
