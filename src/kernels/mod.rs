//! The compute kernels under the decoder: matrix products and the integer products of the
//! output-head screen, each with a portable form and, where the CPU has it, an AVX-512 one.
//!
//! Nothing here knows about models, checkpoints or tokens: a kernel takes slices in a
//! documented layout and fills an output slice. Keeping them apart from `crate::model` lets the
//! model code read as the formulas it implements, and lets each kernel be tested against a
//! plain loop on its own.
//!
//! - [`dense`]: f32 weights in 64-column panels, the product over panels, and `dot`.
//! - [`bf16`]: the optional bf16 weight format and its products.
//! - [`blocks`]: block-quantised weights (4-bit codes with a scale per block) in the panel
//!   layout, read by `dense`'s products through its `Panels` seam; [`nf4`]: bitsandbytes'
//!   NF4/FP4 quantiser and the double quantisation of the scales, bit for bit.
//! - [`ggml`]: GGUF's block formats dequantised as the `gguf` package does, bit for bit, and
//!   a matrix of stored rows read through the same seam; `ggml_dot`: its batch-1 product with
//!   the dequantisation inside the multiply-adds.
//! - [`int8`]: 8-bit rows and activations and their exact integer products (the head screen).
//! - `simd`: the AVX-512 scaffolding written once: CPU features (detected once, used by all
//!   three), and for bf16 and int8 the token groups, the tasks over block pairs and the
//!   dispatch to kernels compiled per group size.

pub mod bf16;
pub mod blocks;
pub mod dense;
pub mod ggml;
mod ggml_dot;
pub mod int8;
pub mod nf4;
mod simd;

/// Multiply-adds below which a kernel stays on the calling thread: handing work to the rayon
/// pool costs microseconds, more than a small product takes.
pub const PARALLEL_WORK: usize = 1 << 18;
