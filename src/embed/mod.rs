//! Sentence embeddings from a local model directory (`--embedder DIR`), computed as
//! sentence-transformers computes them, for the semantic similarity score (docs/scoring.md,
//! "Semantic similarity").
//!
//! The pipeline (checked by `layout`): tokenize with the directory's tokenizer.json (special
//! tokens added, truncated at `max_seq_length` tokens), run the BERT encoder
//! (candle-transformers' `BertModel`, f32 on CPU), pool the last hidden states (the [CLS]
//! vector, or the mean over the attention mask), and scale to unit length when modules.json
//! ends with a Normalize module. Texts are embedded in batches of similar length, padded with
//! the config's `pad_token_id` and masked, so padding changes nothing but rounding.
//!
//! Checked against sentence-transformers on two tiny random directories and, when present, on
//! all-MiniLM-L6-v2 (tests/embedding_reference.rs).

pub mod layout;

use crate::error::{Error, Result};
use candle_core::{DType, Device, Tensor};
use candle_nn::VarBuilder;
use candle_transformers::models::bert::{BertModel, Config};
use layout::{Layout, Pooling};
use rayon::prelude::*;
use std::path::Path;
use tokenizers::{Tokenizer, TruncationParams};

/// Texts per forward pass. Batches are cut from texts sorted by length, so little is padded.
const BATCH: usize = 32;

/// A loaded sentence-embedding model.
pub struct Embedder {
    model: BertModel,
    tokenizer: Tokenizer,
    pad_id: u32,
    pub layout: Layout,
    /// Embedding width (the encoder's hidden_size).
    pub dim: usize,
}

impl Embedder {
    /// Reads and checks the directory, then loads the tokenizer and the weights. Every problem
    /// is an input error naming the file (and the field where there is one).
    pub fn load(dir: &Path) -> Result<Embedder> {
        let layout = layout::read(dir)?;
        let config_path = layout.config_path();
        let config: Config = serde_json::from_value(serde_json::Value::Object(
            layout.config.clone(),
        ))
        .map_err(|e| {
            Error::file(
                &config_path,
                format!("not a BERT config liftgate can load: {e}"),
            )
        })?;
        let pad_id = config.pad_token_id as u32;
        let dim = config.hidden_size;

        let tok_path = layout.tokenizer_path();
        let mut tokenizer = Tokenizer::from_file(&tok_path)
            .map_err(|e| Error::file(&tok_path, format!("cannot load tokenizer: {e}")))?;
        tokenizer.with_padding(None);
        tokenizer
            .with_truncation(Some(TruncationParams {
                max_length: layout.max_seq_length,
                ..Default::default()
            }))
            .map_err(|e| Error::file(&tok_path, format!("cannot set truncation: {e}")))?;

        let weights = layout.weights_path();
        let bytes = std::fs::read(&weights)
            .map_err(|e| Error::file(&weights, format!("cannot read: {e}")))?;
        let vb = VarBuilder::from_buffered_safetensors(bytes, DType::F32, &Device::Cpu)
            .map_err(|e| Error::file(&weights, format!("not a safetensors file: {e}")))?;
        let model = BertModel::load(vb, &config).map_err(|e| {
            Error::file(
                &weights,
                format!("does not hold the BERT encoder config.json describes: {e}"),
            )
        })?;
        Ok(Embedder {
            model,
            tokenizer,
            pad_id,
            layout,
            dim,
        })
    }

    /// One embedding per text, in the texts' order. `progress` is called with the number of
    /// texts done after each batch.
    pub fn embed(&self, texts: &[&str], mut progress: impl FnMut(usize)) -> Result<Vec<Vec<f32>>> {
        let mut ids: Vec<Vec<u32>> = Vec::with_capacity(texts.len());
        for t in texts {
            let text = if self.layout.lower_case {
                t.to_lowercase()
            } else {
                t.to_string()
            };
            let enc = self
                .tokenizer
                .encode(text, true)
                .map_err(|e| Error::internal(format!("the tokenizer failed on a text: {e}")))?;
            ids.push(enc.get_ids().to_vec());
        }
        let mut order: Vec<usize> = (0..texts.len()).collect();
        order.sort_by_key(|&i| ids[i].len());
        let mut out = vec![Vec::new(); texts.len()];
        let mut done = 0;
        // Batches run in parallel, a round of them at a time (one forward pass of a small
        // encoder keeps about one core busy); progress is reported after each round.
        let batches: Vec<&[usize]> = order.chunks(BATCH).collect();
        let round = 4 * rayon::current_num_threads().max(1);
        for group in batches.chunks(round) {
            let results: Vec<candle_core::Result<Vec<Vec<f32>>>> = group
                .par_iter()
                .map(|batch| {
                    let rows: Vec<&[u32]> = batch.iter().map(|&i| ids[i].as_slice()).collect();
                    self.forward(&rows)
                })
                .collect();
            for (batch, vecs) in group.iter().zip(results) {
                let vecs =
                    vecs.map_err(|e| Error::internal(format!("the embedding model failed: {e}")))?;
                for (&i, v) in batch.iter().zip(vecs) {
                    out[i] = v;
                }
                done += batch.len();
            }
            progress(done);
        }
        Ok(out)
    }

    /// Pooled (and normalised) embeddings of one padded batch.
    fn forward(&self, rows: &[&[u32]]) -> candle_core::Result<Vec<Vec<f32>>> {
        let b = rows.len();
        let len = rows.iter().map(|r| r.len()).max().unwrap_or(0).max(1);
        let mut input = vec![self.pad_id; b * len];
        let mut mask = vec![0u32; b * len];
        for (r, row) in rows.iter().enumerate() {
            input[r * len..r * len + row.len()].copy_from_slice(row);
            mask[r * len..r * len + row.len()].fill(1);
        }
        let input = Tensor::from_vec(input, (b, len), &Device::Cpu)?;
        let mask_t = Tensor::from_vec(mask.clone(), (b, len), &Device::Cpu)?;
        let types = input.zeros_like()?;
        // [b, len, hidden]
        let hidden = self.model.forward(&input, &types, Some(&mask_t))?;
        let hidden = hidden.to_vec3::<f32>()?;
        Ok(hidden
            .iter()
            .enumerate()
            .map(|(r, states)| {
                let v = pool(self.layout.pooling, states, &mask[r * len..(r + 1) * len]);
                if self.layout.normalize {
                    normalise(v)
                } else {
                    v
                }
            })
            .collect())
    }
}

/// Pools one text's token vectors: [CLS] (the first), or the mean over the tokens whose mask
/// is 1, as sentence-transformers' Pooling does (sum of masked vectors divided by the token
/// count, the count clamped below at 1e-9).
pub fn pool(mode: Pooling, states: &[Vec<f32>], mask: &[u32]) -> Vec<f32> {
    let dim = states.first().map_or(0, Vec::len);
    match mode {
        Pooling::Cls => states.first().cloned().unwrap_or_default(),
        Pooling::Mean => {
            let mut sum = vec![0.0f32; dim];
            let mut count = 0.0f32;
            for (s, &m) in states.iter().zip(mask) {
                if m != 0 {
                    for (a, x) in sum.iter_mut().zip(s) {
                        *a += x;
                    }
                    count += 1.0;
                }
            }
            let count = count.max(1e-9);
            sum.iter().map(|a| a / count).collect()
        }
    }
}

/// `v / max(‖v‖₂, 1e-12)`, as `torch.nn.functional.normalize` (sentence-transformers'
/// Normalize module).
pub fn normalise(v: Vec<f32>) -> Vec<f32> {
    let norm = v.iter().map(|x| x * x).sum::<f32>().sqrt().max(1e-12);
    v.into_iter().map(|x| x / norm).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn mean_pooling_skips_padding_and_cls_takes_the_first_token() {
        let states = vec![vec![1.0, 2.0], vec![3.0, 4.0], vec![100.0, 100.0]];
        assert_eq!(pool(Pooling::Mean, &states, &[1, 1, 0]), vec![2.0, 3.0]);
        assert_eq!(pool(Pooling::Cls, &states, &[1, 1, 0]), vec![1.0, 2.0]);
    }

    #[test]
    fn normalising_gives_unit_length_and_keeps_zero() {
        let v = normalise(vec![3.0, 4.0]);
        assert!((v[0] - 0.6).abs() < 1e-7 && (v[1] - 0.8).abs() < 1e-7);
        assert_eq!(normalise(vec![0.0, 0.0]), vec![0.0, 0.0]);
    }
}
