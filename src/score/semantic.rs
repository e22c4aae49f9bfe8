//! Semantic similarity of an answer to its references: the cosine of their sentence embeddings,
//! maximised over the references (SemScore: Aynetdinov and Akbik 2024, "SemScore: Automated
//! Evaluation of Instruction-Tuned LLMs based on Semantic Textual Similarity", which scores a
//! response by the cosine between its embedding and the reference's; the paper used
//! all-mpnet-base-v2, from memory. liftgate takes the embedding model from `--embedder DIR`,
//! and the maximum over several references as the other reference scores do).
//!
//! `cos(a, b) = a·b / (‖a‖ ‖b‖)`, in [−1, 1]; 0 when either vector is all zeros (where the
//! quotient is undefined), as `sentence_transformers.util.cos_sim` gives through its clamped
//! normalisation. Sums run in f64 over the f32 embeddings.
//!
//! What the number means: how close the two texts lie in the embedding model's space, which
//! tracks paraphrase and topic. What it does not mean: that the answer is correct. Two
//! sentences that differ only in a departure time or a price embed almost identically, so a
//! wrong fact keeps a high score (the fact scorer is there for that), and values are comparable
//! only between grades made with the same embedding model.

/// Cosine similarity of two vectors of the same length; 0 when either has zero length.
pub fn cosine(a: &[f32], b: &[f32]) -> f64 {
    debug_assert_eq!(a.len(), b.len(), "embeddings of different widths");
    let (mut dot, mut aa, mut bb) = (0.0f64, 0.0f64, 0.0f64);
    for (&x, &y) in a.iter().zip(b) {
        let (x, y) = (x as f64, y as f64);
        dot += x * y;
        aa += x * x;
        bb += y * y;
    }
    if aa == 0.0 || bb == 0.0 {
        return 0.0;
    }
    (dot / (aa.sqrt() * bb.sqrt())).clamp(-1.0, 1.0)
}

/// The largest cosine of `answer` with any of `references`; `None` without references.
pub fn max_cosine<'a>(
    answer: &[f32],
    references: impl IntoIterator<Item = &'a [f32]>,
) -> Option<f64> {
    references
        .into_iter()
        .map(|r| cosine(answer, r))
        .fold(None, |best, c| Some(best.map_or(c, |b: f64| b.max(c))))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cosine_by_hand() {
        // (1, 0)·(1, 1) / (1 · √2) = 1/√2.
        assert!((cosine(&[1.0, 0.0], &[1.0, 1.0]) - 0.5f64.sqrt()).abs() < 1e-12);
        assert!((cosine(&[1.0, 2.0], &[2.0, 4.0]) - 1.0).abs() < 1e-12);
        assert!((cosine(&[1.0, 2.0], &[-1.0, -2.0]) + 1.0).abs() < 1e-12);
        assert_eq!(cosine(&[0.0, 0.0], &[1.0, 2.0]), 0.0);
    }

    #[test]
    fn max_over_references() {
        let refs: [&[f32]; 2] = [&[0.0, 1.0], &[1.0, 0.1]];
        let best = max_cosine(&[1.0, 0.0], refs).unwrap();
        assert!((best - 1.0 / 1.01f64.sqrt()).abs() < 1e-6);
        assert_eq!(max_cosine(&[1.0, 0.0], std::iter::empty()), None);
    }
}
