//! Dense f32 matrix products: the layout linear layers keep their weights in, and the
//! products over it.
//!
//! A linear layer's [out, inp] matrix is stored in panels of 64 output columns
//! ([`pack_panels_into`]): each panel is one contiguous run that a product reads front to back,
//! so the weights are never repacked per call (repacking would read and write every weight
//! once more per decoding step). On AVX-512, f32 and 16-bit panels go through one loop at every
//! batch size ([`panel_many_avx512`]): rows in groups of up to 24 read each panel once, a span
//! of 64 inputs at a time held in the first-level cache while passes of up to six rows, their
//! sums in registers, go over it. Block-quantised panels, and every panel on other CPUs, are
//! read as f32 pieces by a few-rows loop ([`panel_rows`]) or as a whole f32 panel by the
//! many-rows one ([`panel_many`]).
//!
//! Every output is summed the same way whatever the batch: for each row and output column, one
//! chain over the inputs in order, from zero, each step a fused multiply-add (x·w + sum rounded
//! once, IEEE 754 `fusedMultiplyAdd`). A loop keeps many outputs' chains going at once (64
//! columns of up to six rows), so no step waits on the one before. Each output is computed by
//! one task, so results do not depend on the thread count, and a row's result does not depend
//! on the other rows of its batch: the decoder's batched output equals its batch-1 output bit
//! for bit, and rows of several model variants can share one step. Where the CPU has no fused
//! multiply-add instruction, `f32::mul_add` computes the same value in software (slowly), so
//! the result does not depend on the CPU either.
//!
//! Checkpoints stored in bf16 or f16 keep their weights 16-bit in the same panel layout
//! ([`matmul_half`]): each weight is widened to f32 inside the product, just before its
//! multiply-add, in the same order as the f32 product. Widening bf16 or f16 to f32 is exact, so
//! the result is bit for bit the one the f32 product gives on the widened matrix (which is what
//! the reference computes after loading the checkpoint with dtype float32), while a batch-1
//! step reads half the bytes.
//!
//! These loops are written here rather than taken from a matrix library because of that
//! property: a library's kernels sum in an order that depends on the batch size, the CPU and
//! its blocking, so a row's answer would change with the batch.

use super::simd::features;
use super::PARALLEL_WORK;
use rayon::prelude::*;

/// Output columns per panel of a linear layer's weights (four 16-lane vectors).
pub const PANEL: usize = 64;

/// Values a linear layer of `out` × `inp` takes in the panel layout (the last panel padded).
pub fn panel_len(out: usize, inp: usize) -> usize {
    out.div_ceil(PANEL) * inp * PANEL
}

/// Writes `a` ([rows, cols] row-major, output rows `at..at + rows` of a layer) into the panel
/// layout `t`: panel p holds output columns 64p..64p + 64 as [cols, 64] row-major, so one
/// panel is one contiguous run that the products read front to back.
pub fn pack_panels_into<T: Copy>(a: &[T], rows: usize, cols: usize, t: &mut [T], at: usize) {
    for r in 0..rows {
        let j = at + r;
        let base = (j / PANEL) * cols * PANEL + j % PANEL;
        for (c, &v) in a[r * cols..(r + 1) * cols].iter().enumerate() {
            t[base + c * PANEL] = v;
        }
    }
}

#[cfg(test)]
fn pack_panels(a: &[f32], rows: usize, cols: usize) -> Vec<f32> {
    let mut t = vec![0.0; panel_len(rows, cols)];
    pack_panels_into(a, rows, cols, &mut t, 0);
    t
}

/// For the weight formats' tests: the product over `w` equals, bit for bit, the f32 product
/// over `dense` ([out, inp] row-major, the values the format should stand for), on n rows of
/// a fixed input.
#[cfg(test)]
pub(crate) fn assert_panels_equal_dense<W: Panels>(
    w: &W,
    dense: &[f32],
    n: usize,
    inp: usize,
    out: usize,
) {
    let wp = pack_panels(dense, out, inp);
    let x: Vec<f32> = (0..n * inp)
        .map(|i| ((i * 5) % 17) as f32 * 0.21 - 1.3)
        .collect();
    let (mut want, mut got) = (vec![0.0; n * out], vec![0.0; n * out]);
    matmul(&x, n, inp, &wp, out, &mut want);
    matmul_panels(&x, n, inp, w, out, &mut got);
    let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&want), bits(&got), "n {n} inp {inp} out {out}");
}

/// A pointer to the output of a product, shared by tasks that write disjoint columns.
#[derive(Clone, Copy)]
pub(super) struct Columns(pub(super) *mut f32);

impl Columns {
    /// The pointer (a method, so a closure captures the `Sync` wrapper, not the raw pointer).
    pub(super) fn get(self) -> *mut f32 {
        self.0
    }
}

// SAFETY: a product's tasks write disjoint sets of columns through it, and the buffer outlives
// them (they end before the product returns).
unsafe impl Send for Columns {}
unsafe impl Sync for Columns {}

/// y[n, out] = x[n, inp] · W, with W in the panel layout ([`pack_panels_into`]), one task per
/// panel on the rayon pool.
///
/// Each row is summed as it would be alone (see the module's summary), and each output is
/// computed by one task in a fixed order, so the result depends neither on the thread count
/// nor on the batch.
pub fn matmul(x: &[f32], n: usize, inp: usize, w: &[f32], out: usize, y: &mut [f32]) {
    assert!(w.len() >= panel_len(out, inp));
    products(x, n, inp, &Stored { w, inp }, out, y);
}

/// How a product reads a panel of weights: f32 as stored, 16-bit widened.
trait PanelRead: Copy + Sync {
    /// The f32 values of `src` (rows of a panel): `src` itself, or widened into `buf`.
    fn piece<'a>(src: &'a [Self], buf: &'a mut [f32]) -> &'a [f32];
    /// Calls `f` on the panel as f32 values (many rows).
    fn as_f32(panel: &[Self], f: impl FnOnce(&[f32]));
    /// The 64 weights of input k of a panel at `w` as f32, in four vectors whose lanes hold the
    /// columns [`PanelRead::lane_column`] gives (for [`panel_many_avx512`]).
    ///
    /// # Safety
    /// The panel at `w` has more than k inputs; the CPU has AVX-512F and the caller is compiled
    /// for it.
    #[cfg(target_arch = "x86_64")]
    unsafe fn row_avx512(w: *const Self, k: usize) -> [std::arch::x86_64::__m512; 4];
    /// The column (0..64) in lane `lane` of vector `v` of [`PanelRead::row_avx512`].
    fn lane_column(v: usize, lane: usize) -> usize;
}

impl PanelRead for f32 {
    #[inline(always)]
    fn piece<'a>(src: &'a [f32], _buf: &'a mut [f32]) -> &'a [f32] {
        src
    }
    fn as_f32(panel: &[f32], f: impl FnOnce(&[f32])) {
        f(panel);
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn row_avx512(w: *const f32, k: usize) -> [std::arch::x86_64::__m512; 4] {
        // SAFETY: the 64 values of input k are readable (the caller's promise).
        std::array::from_fn(|v| unsafe {
            std::arch::x86_64::_mm512_loadu_ps(w.add(k * PANEL + 16 * v))
        })
    }
    fn lane_column(v: usize, lane: usize) -> usize {
        16 * v + lane
    }
}

impl<H: Half> PanelRead for H {
    #[inline(always)]
    fn piece<'a>(src: &'a [H], buf: &'a mut [f32]) -> &'a [f32] {
        let piece = &mut buf[..src.len()];
        H::widen(src, piece);
        piece
    }
    fn as_f32(panel: &[H], f: impl FnOnce(&[f32])) {
        with_panel_buffer(panel.len(), |buf| {
            H::widen(panel, buf);
            f(buf);
        });
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn row_avx512(w: *const H, k: usize) -> [std::arch::x86_64::__m512; 4] {
        // SAFETY: the 64 values of input k are readable, AVX-512F (the caller's promise).
        let ([a, b], [c, d]) = unsafe {
            (
                H::widen32(w.add(k * PANEL)),
                H::widen32(w.add(k * PANEL + 32)),
            )
        };
        [a, b, c, d]
    }
    fn lane_column(v: usize, lane: usize) -> usize {
        32 * (v / 2) + H::column(v % 2, lane)
    }
}

/// The weights of a linear layer in the panel layout, however they are held: the seam between
/// the products and the weight formats. A product asks for the f32 values of a piece of a
/// panel (rows k0..k1, [k1 - k0, 64]) or of a whole panel; a format answers by lending them
/// (f32 as stored) or by writing them into the buffer it is given (16-bit widened, block
/// quantised codes times their scales), so the product never sees the stored form and every
/// format gets the same sums on the same f32 values.
pub trait Panels: Sync {
    /// Rows `k0..k1` of panel `p` as f32, [k1 - k0, 64]; `buf` holds at least that many.
    /// `k0` is a multiple of [`PIECE_ROWS`].
    fn piece<'a>(&'a self, p: usize, k0: usize, k1: usize, buf: &'a mut [f32]) -> &'a [f32];
    /// Calls `f` on panel `p` as f32 values, [inp, 64].
    fn whole(&self, p: usize, f: &mut dyn FnMut(&[f32]));
    /// The sums of panel `p` for every row of `x` ([`panel_many_avx512`]) read from the
    /// stored values, at any batch size; false when the format has no such loop (the product
    /// then gets the panel as f32 from [`Panels::piece`] or [`Panels::whole`]).
    ///
    /// # Safety
    /// The CPU has AVX-512F.
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn many_avx512(
        &self,
        _x: &[f32],
        _p: usize,
        _emit: &mut dyn FnMut(usize, &[f32; PANEL]),
    ) -> bool {
        false
    }
}

/// A panel-layout slice of f32 or 16-bit values with its input size.
struct Stored<'a, T> {
    w: &'a [T],
    inp: usize,
}

impl<T: PanelRead> Panels for Stored<'_, T> {
    #[inline(always)]
    fn piece<'a>(&'a self, p: usize, k0: usize, k1: usize, buf: &'a mut [f32]) -> &'a [f32] {
        let base = p * self.inp * PANEL;
        T::piece(&self.w[base + k0 * PANEL..base + k1 * PANEL], buf)
    }
    fn whole(&self, p: usize, f: &mut dyn FnMut(&[f32])) {
        T::as_f32(&self.w[p * self.inp * PANEL..(p + 1) * self.inp * PANEL], f);
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn many_avx512(
        &self,
        x: &[f32],
        p: usize,
        emit: &mut dyn FnMut(usize, &[f32; PANEL]),
    ) -> bool {
        // The panel and, when there is one, the first span of the next: a task's panels are
        // mostly consecutive, so its last span's pass fetches what the next one starts with.
        let start = p * self.inp * PANEL;
        let end = ((p + 1) * self.inp + MANY_SPAN) * PANEL;
        let panel = &self.w[start..end.min(self.w.len())];
        assert!(self.inp > 0 && x.len().is_multiple_of(self.inp));
        // SAFETY: the CPU has AVX-512F (the caller's promise); the panel holds inp·64 values
        // and x whole rows (asserted).
        unsafe { panel_many_avx512(panel, x, self.inp, emit) };
        true
    }
}

/// Calls `f` on this thread's panel buffer of `len` values (for formats that must write a
/// whole panel out as f32 before the many-rows product reads it).
pub fn with_panel_buffer(len: usize, f: impl FnOnce(&mut [f32])) {
    WIDE.with(|buf| {
        let mut buf = buf.borrow_mut();
        buf.resize(len, 0.0);
        f(&mut buf);
    });
}

/// Rows up to which a product over f32 pieces (block-quantised panels; any panel without
/// AVX-512) reads each panel once for all rows with [`panel_rows`] instead of [`panel_many`]:
/// small batches, where decoding waits on memory. Either loop sums each row as at batch 1.
pub const FEW_ROWS: usize = 4;

/// y[n, out] = x[n, inp] · W over the panels of `w`, one task per panel (see [`matmul`]).
fn products<W: Panels>(x: &[f32], n: usize, inp: usize, w: &W, out: usize, y: &mut [f32]) {
    assert!(x.len() >= n * inp && y.len() >= n * out);
    if n == 0 || out == 0 {
        return;
    }
    if inp == 0 {
        // Empty sums.
        y[..n * out].fill(0.0);
        return;
    }
    let yc = Columns(y.as_mut_ptr());
    let one = |p: usize| {
        let j0 = p * PANEL;
        let width = PANEL.min(out - j0);
        let mut emit = |t: usize, sums: &[f32; PANEL]| {
            // SAFETY: columns j0..j0 + width of each output row belong to this task, and t < n.
            unsafe {
                std::ptr::copy_nonoverlapping(sums.as_ptr(), yc.get().add(t * out + j0), width)
            };
        };
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the CPU has AVX-512F (checked first).
        if features().avx512f && unsafe { w.many_avx512(&x[..n * inp], p, &mut emit) } {
            return;
        }
        if n <= FEW_ROWS {
            let mut acc = [[0f32; PANEL]; FEW_ROWS];
            panel_rows(&mut acc[..n], &x[..n * inp], inp, w, p);
            for (t, a) in acc[..n].iter().enumerate() {
                emit(t, a);
            }
            return;
        }
        w.whole(p, &mut |panel| {
            panel_many(panel, &x[..n * inp], inp, &mut emit)
        });
    };
    let panels = out.div_ceil(PANEL);
    if n * inp * out >= PARALLEL_WORK {
        (0..panels).into_par_iter().for_each(one);
    } else {
        (0..panels).for_each(one);
    }
}

/// A 16-bit float format a checkpoint stores its weights in, widened exactly to f32.
pub trait Half: Copy + Send + Sync + 'static {
    /// dst[i] = src[i] as f32 (exact). Uses the CPU's conversion instructions where present.
    fn widen(src: &[Self], dst: &mut [f32]);
    /// The 32 values at `src` (half of one input's row of a panel) widened to f32 (exact), in
    /// two vectors whose lanes are in the order [`Half::column`] gives.
    ///
    /// # Safety
    /// `src` points at 32 readable values; the CPU has AVX-512F and the caller is compiled
    /// for it (this is inlined into it).
    #[cfg(target_arch = "x86_64")]
    unsafe fn widen32(src: *const Self) -> [std::arch::x86_64::__m512; 2];
    /// The column (0..32) of those 32 values in lane `lane` of vector `v` of [`Half::widen32`].
    fn column(v: usize, lane: usize) -> usize;
}

impl Half for half::bf16 {
    fn widen(src: &[Self], dst: &mut [f32]) {
        use half::slice::HalfFloatSliceExt;
        src.convert_to_f32_slice(dst);
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn widen32(src: *const Self) -> [std::arch::x86_64::__m512; 2] {
        use std::arch::x86_64::*;
        // A bf16 is the top half of the f32 it stands for. Read as 32-bit words, 32 values
        // hold the even columns in their low halves (shifted up) and the odd columns in their
        // high halves (the low halves cleared): two operations for 32 values.
        // SAFETY: 32 values (64 bytes) are readable at `src`; AVX-512F (the caller's promise).
        unsafe {
            let a = _mm512_loadu_si512(src.cast());
            let top = _mm512_set1_epi32(0xFFFF_0000u32 as i32);
            [
                _mm512_castsi512_ps(_mm512_slli_epi32::<16>(a)),
                _mm512_castsi512_ps(_mm512_and_si512(a, top)),
            ]
        }
    }
    fn column(v: usize, lane: usize) -> usize {
        2 * lane + v
    }
}

impl Half for half::f16 {
    fn widen(src: &[Self], dst: &mut [f32]) {
        use half::slice::HalfFloatSliceExt;
        src.convert_to_f32_slice(dst);
    }
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    unsafe fn widen32(src: *const Self) -> [std::arch::x86_64::__m512; 2] {
        use std::arch::x86_64::*;
        // SAFETY: 32 values (64 bytes) are readable at `src`; AVX-512F (the caller's
        // promise), whose conversion instruction widens f16 exactly (subnormals included).
        std::array::from_fn(|v| unsafe {
            _mm512_cvtph_ps(_mm256_loadu_si256(src.add(16 * v).cast()))
        })
    }
    fn column(v: usize, lane: usize) -> usize {
        16 * v + lane
    }
}

thread_local! {
    /// One widened panel, for the products of several rows over 16-bit weights.
    static WIDE: std::cell::RefCell<Vec<f32>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// As [`matmul`], with W stored 16-bit in the panel layout and widened inside the product:
/// bit for bit the result of [`matmul`] on the widened weights. On AVX-512 each weight is
/// widened in a register just before its multiply-add ([`panel_many_avx512`]); otherwise up
/// to [`FEW_ROWS`] rows stream each panel through a small buffer in pieces of [`PIECE_ROWS`]
/// rows, and more rows widen the whole panel once per call (into a per-thread buffer) and run
/// the same many-rows loop as the f32 product.
pub fn matmul_half<H: Half>(x: &[f32], n: usize, inp: usize, w: &[H], out: usize, y: &mut [f32]) {
    assert!(w.len() >= panel_len(out, inp));
    products(x, n, inp, &Stored { w, inp }, out, y);
}

/// As [`matmul`], with W held in any format that reads out as f32 panels ([`Panels`]): bit for
/// bit [`matmul`] on the f32 values the format gives.
pub fn matmul_panels<W: Panels>(x: &[f32], n: usize, inp: usize, w: &W, out: usize, y: &mut [f32]) {
    products(x, n, inp, w, out, y);
}

/// Rows of a panel taken at a time by the few-rows product: 8 KB of f32 that stay in the
/// first-level cache.
pub const PIECE_ROWS: usize = 32;

/// acc[t][l] = Σₖ x[t·inp + k]·panel[k·64 + l] for each of the n = acc.len() ≤ [`FEW_ROWS`]
/// rows, reading the panel once: piece by piece ([`PIECE_ROWS`] rows, widened first when
/// 16-bit), each piece added into every row's sums while it is in the first-level cache. Each
/// row's sums are in the same order as alone, so a row's result does not depend on the others.
/// With AVX-512 (found at run time) the loop is compiled for 16-wide vectors.
pub(super) fn panel_rows<W: Panels>(
    acc: &mut [[f32; PANEL]],
    x: &[f32],
    inp: usize,
    w: &W,
    p: usize,
) {
    #[cfg(target_arch = "x86_64")]
    {
        if features().avx512f {
            // SAFETY: the CPU has AVX-512F (checked just above).
            unsafe { panel_rows_avx512(acc, x, inp, w, p) };
            return;
        }
        if features().fma {
            // SAFETY: the CPU has AVX2 and FMA (checked just above).
            unsafe { panel_rows_fma(acc, x, inp, w, p) };
            return;
        }
    }
    panel_rows_any(acc, x, inp, w, p);
}

/// [`panel_rows_any`] compiled for AVX2 with fused multiply-add.
///
/// # Safety
/// The CPU has AVX2 and FMA.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn panel_rows_fma<W: Panels>(
    acc: &mut [[f32; PANEL]],
    x: &[f32],
    inp: usize,
    w: &W,
    p: usize,
) {
    panel_rows_any(acc, x, inp, w, p);
}

/// [`panel_rows_any`] compiled for AVX-512.
///
/// # Safety
/// The CPU has AVX-512F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn panel_rows_avx512<W: Panels>(
    acc: &mut [[f32; PANEL]],
    x: &[f32],
    inp: usize,
    w: &W,
    p: usize,
) {
    panel_rows_any(acc, x, inp, w, p);
}

/// One copy of the loop per row count, so one row keeps its 64 sums in registers.
#[inline(always)]
fn panel_rows_any<W: Panels>(acc: &mut [[f32; PANEL]], x: &[f32], inp: usize, w: &W, p: usize) {
    assert!(
        acc.len() <= FEW_ROWS,
        "more rows than the few-rows loop holds"
    );
    match acc.len() {
        1 => panel_rows_body::<W, 1>(acc, x, inp, w, p),
        2 => panel_rows_body::<W, 2>(acc, x, inp, w, p),
        3 => panel_rows_body::<W, 3>(acc, x, inp, w, p),
        _ => panel_rows_body::<W, FEW_ROWS>(acc, x, inp, w, p),
    }
}

/// The sums of N rows over one panel, a piece of [`PIECE_ROWS`] inputs at a time; each row's
/// 64 sums are independent chains of multiply-adds, so consecutive ones do not wait on each
/// other.
#[inline(always)]
fn panel_rows_body<W: Panels, const N: usize>(
    acc: &mut [[f32; PANEL]],
    x: &[f32],
    inp: usize,
    w: &W,
    p: usize,
) {
    let mut sums = [[0f32; PANEL]; N];
    let mut buf = [0f32; PIECE_ROWS * PANEL];
    let mut k0 = 0;
    while k0 < inp {
        let k1 = (k0 + PIECE_ROWS).min(inp);
        let piece = w.piece(p, k0, k1, &mut buf);
        for (t, s) in sums.iter_mut().enumerate() {
            accumulate(s, &x[t * inp + k0..t * inp + k1], piece);
        }
        k0 = k1;
    }
    acc[..N].copy_from_slice(&sums);
}

/// Rows of a batch that [`panel_many`] takes through a panel together: their sums (24 rows of
/// four vectors, 6 KB) stay in the first-level cache while a span of the panel is read once
/// for them all.
const MANY_GROUP: usize = 24;

/// Inputs per span of [`panel_many`]: 16 KB of the panel, which stays in the first-level cache
/// while every six rows of a group pass over it (64 and 128 measured alike, 256 about 15%
/// slower: `bench/kernels.sh`).
const MANY_SPAN: usize = 64;

/// Calls `emit(t, sums)` with the 64 sums Σₖ x[t·inp + k]·panel[k·64 + l] of each row t of `x`
/// ([n, inp]), `panel` being one f32 panel ([inp, 64]): the product of many rows (batched
/// decoding, prompt steps). Each row is summed exactly as [`panel_rows`] sums it, so a row's
/// sums do not depend on how many rows come with it.
fn panel_many(panel: &[f32], x: &[f32], inp: usize, emit: &mut dyn FnMut(usize, &[f32; PANEL])) {
    assert!(inp > 0 && panel.len() >= inp * PANEL && x.len().is_multiple_of(inp));
    #[cfg(target_arch = "x86_64")]
    if features().avx512f {
        // SAFETY: the CPU has AVX-512F (checked just above); the lengths are asserted.
        unsafe { panel_many_avx512(panel, x, inp, emit) };
        return;
    }
    let n = x.len() / inp;
    let stored = Stored { w: panel, inp };
    let mut t0 = 0;
    while t0 < n {
        let rows = (n - t0).min(FEW_ROWS);
        let mut acc = [[0f32; PANEL]; FEW_ROWS];
        panel_rows(
            &mut acc[..rows],
            &x[t0 * inp..(t0 + rows) * inp],
            inp,
            &stored,
            0,
        );
        for (t, sums) in acc[..rows].iter().enumerate() {
            emit(t0 + t, sums);
        }
        t0 += rows;
    }
}

/// The sums of [`panel_many_avx512`] for one row, one vector per 16 columns.
#[cfg(target_arch = "x86_64")]
type RowSums = [std::arch::x86_64::__m512; 4];

/// [`panel_many`] on AVX-512: rows in groups of [`MANY_GROUP`], the panel in spans of
/// [`MANY_SPAN`] inputs, and within a span, rows six at a time with their 24 sums in registers
/// ([`many_pass`]): each weight vector is loaded once for six rows' fused multiply-adds, so the
/// loop is bound by the multiply-adds rather than by loads.
///
/// # Safety
/// The CPU has AVX-512F; `panel` holds inp·64 values (any more are only fetched ahead) and `x` a
/// whole number of rows of `inp`.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn panel_many_avx512<T: PanelRead>(
    panel: &[T],
    x: &[f32],
    inp: usize,
    emit: &mut dyn FnMut(usize, &[f32; PANEL]),
) {
    debug_assert!(panel.len() >= inp * PANEL);
    // Every span is read where it is stored; the first pass over a span fetches the next span
    // ahead of its use, and the last span's first pass fetches whatever `panel` holds past the
    // panel (the start of the next one).
    let readable = panel.len() / PANEL;
    let mut span = |k0: usize, k1: usize| {
        let at = panel[k0 * PANEL..].as_ptr();
        (at, (k1 + MANY_SPAN).min(readable) - k1)
    };
    // SAFETY: as this function's; `span` points into the panel, which holds every input.
    unsafe { many_rows_avx512::<T>(x, inp, MANY_GROUP, emit, &mut span) };
}

/// Rows up to which [`panel_many_spans_avx512`] takes a batch through each span in one group
/// (their sums, 16 KB, and the span, 16 KB, fit the first-level cache together), so each span
/// is written out once.
pub const SPAN_ROWS: usize = 64;

/// [`panel_many_avx512`] over a panel that is not stored as f32 or 16-bit values (GGUF blocks),
/// taking up to [`SPAN_ROWS`] rows through each span together: `fill(k0, k1, buf)` writes
/// inputs k0..k1 of the panel as f32 values into `buf` ([k1 - k0, 64]), one span of
/// [`MANY_SPAN`] inputs at a time (k0 a multiple of it), and every row passes over it while it
/// is in the first-level cache, so the f32 values of the whole panel are never written out.
/// Each row is summed exactly as over the whole panel in f32. (More rows are taken in groups,
/// each span written out again for each.)
///
/// # Safety
/// The CPU has AVX-512F; `x` holds a whole number of rows of `inp`; `fill` writes every value
/// of the span it is asked for.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
pub(super) unsafe fn panel_many_spans_avx512(
    x: &[f32],
    inp: usize,
    emit: &mut dyn FnMut(usize, &[f32; PANEL]),
    fill: &mut dyn FnMut(usize, usize, &mut [f32]),
) {
    let mut buf = [0f32; MANY_SPAN * PANEL];
    let mut span = |k0: usize, k1: usize| {
        fill(k0, k1, &mut buf[..(k1 - k0) * PANEL]);
        // Input k0 first; nothing to fetch ahead.
        (buf.as_ptr(), 0)
    };
    // SAFETY: as this function's; `span` gives inputs k0..k1 in `buf`, input k0 first.
    unsafe { many_rows_avx512::<f32>(x, inp, SPAN_ROWS, emit, &mut span) };
}

/// The loops of [`panel_many_avx512`], rows in groups of at most `most` (≤ [`SPAN_ROWS`]);
/// `span(k0, k1)` gives `(at, ahead)`: input k's 64 values (k0 ≤ k < k1) at at + 64(k − k0),
/// and how many inputs from k1 on follow them there, to be prefetched during the first pass.
///
/// # Safety
/// The CPU has AVX-512F; `x` holds a whole number of rows of `inp`; the inputs `span` promises
/// are readable until it is called again.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn many_rows_avx512<T: PanelRead>(
    x: &[f32],
    inp: usize,
    most: usize,
    emit: &mut dyn FnMut(usize, &[f32; PANEL]),
    span: &mut dyn FnMut(usize, usize) -> (*const T, usize),
) {
    use std::arch::x86_64::*;
    assert!(inp > 0 && x.len().is_multiple_of(inp) && (1..=SPAN_ROWS).contains(&most));
    let n = x.len() / inp;
    let mut sums: [RowSums; SPAN_ROWS] = [[_mm512_setzero_ps(); 4]; SPAN_ROWS];
    // Rows are dealt out evenly, to groups and within a group to passes (32 rows: two groups
    // of 16, each three passes of 6, 5 and 5), so no pass is left with one or two rows, which
    // would load each weight vector for too few multiply-adds.
    let even_share = |left: usize, most: usize| left.div_ceil(left.div_ceil(most));
    let mut g0 = 0;
    while g0 < n {
        let rows = even_share(n - g0, most);
        sums[..rows].fill([_mm512_setzero_ps(); 4]);
        let mut k0 = 0;
        while k0 < inp {
            let k1 = (k0 + MANY_SPAN).min(inp);
            let (w, ahead) = span(k0, k1);
            let mut t = 0;
            while t < rows {
                let take = even_share(rows - t, 6);
                let group = &mut sums[t..t + take];
                let xs = &x[(g0 + t) * inp..(g0 + t + take) * inp];
                let ahead = if t == 0 { ahead } else { 0 };
                // SAFETY: as this function's; inputs k0..k1 at w, input k0 first.
                unsafe {
                    match take {
                        1 => many_pass::<T, 1>(group, xs, inp, w, k0, k1, ahead),
                        2 => many_pass::<T, 2>(group, xs, inp, w, k0, k1, ahead),
                        3 => many_pass::<T, 3>(group, xs, inp, w, k0, k1, ahead),
                        4 => many_pass::<T, 4>(group, xs, inp, w, k0, k1, ahead),
                        5 => many_pass::<T, 5>(group, xs, inp, w, k0, k1, ahead),
                        _ => many_pass::<T, 6>(group, xs, inp, w, k0, k1, ahead),
                    }
                }
                t += take;
            }
            k0 = k1;
        }
        for (t, s) in sums[..rows].iter().enumerate() {
            let mut row = [0f32; PANEL];
            for (v, s) in s.iter().enumerate() {
                let mut lanes = [0f32; 16];
                // SAFETY: `lanes` holds 16 values.
                unsafe { _mm512_storeu_ps(lanes.as_mut_ptr(), *s) };
                for (lane, value) in lanes.into_iter().enumerate() {
                    row[T::lane_column(v, lane)] = value;
                }
            }
            emit(g0 + t, &row);
        }
        g0 += rows;
    }
}

/// One pass of [`panel_many_avx512`]: inputs k0..k1 of the panel at `w` (input k at
/// w + 64(k − k0)) into the sums of N rows, and a prefetch of the `ahead` inputs that follow
/// them (spread over the pass).
///
/// # Safety
/// The CPU has AVX-512F; inputs k0..k1 are readable at `w`, so are the `ahead` values that
/// follow them in memory (the rest of the panel, or the next one's start), and `x` holds
/// N·inp values.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn many_pass<T: PanelRead, const N: usize>(
    sums: &mut [RowSums],
    x: &[f32],
    inp: usize,
    w: *const T,
    k0: usize,
    k1: usize,
    ahead: usize,
) {
    use std::arch::x86_64::*;
    debug_assert!(sums.len() == N && x.len() >= N * inp);
    let xp = x.as_ptr();
    let mut s = [[_mm512_setzero_ps(); 4]; N];
    s.copy_from_slice(sums);
    for k in k0..k1 {
        if k - k0 < ahead {
            // The 64 values of input k1 + k - k0: one cache line per 16 bytes of a value.
            let next = w.wrapping_add((k1 - k0 + k - k0) * PANEL).cast::<u8>();
            for line in 0..size_of::<T>() {
                // SAFETY: a prefetch reads nothing into the program (and input
                // k1 + k - k0 < k1 + ahead is readable: the panel or the next one's start).
                unsafe { _mm_prefetch::<_MM_HINT_T0>(next.add(64 * line).cast()) };
            }
        }
        // SAFETY: input k (k0 ≤ k < k1) is readable at w, its place k - k0; AVX-512F is this
        // function's promise.
        let wk = unsafe { T::row_avx512(w, k - k0) };
        for (t, s) in s.iter_mut().enumerate() {
            // SAFETY: t < N and k < inp, so t·inp + k < N·inp ≤ x.len().
            let xt = unsafe { _mm512_set1_ps(*xp.add(t * inp + k)) };
            for (s, wv) in s.iter_mut().zip(wk) {
                *s = _mm512_fmadd_ps(xt, wv, *s);
            }
        }
    }
    sums.copy_from_slice(&s);
}

/// sums[l] = x[k]·rows[k·64 + l] + sums[l] for each k of `x` in order, each step one fused
/// multiply-add.
#[inline(always)]
fn accumulate(sums: &mut [f32; PANEL], x: &[f32], panel: &[f32]) {
    for (row, &xk) in panel.chunks_exact(PANEL).zip(x) {
        for l in 0..PANEL {
            sums[l] = xk.mul_add(row[l], sums[l]);
        }
    }
}

/// Sum of products with sixteen independent partial sums, so the compiler can use vector
/// registers (a single running sum would force one addition at a time). With AVX-512 (found at
/// run time) the loop is compiled for 16-wide vectors; the sum is the same either way: each
/// step a multiply, then an add, in the same order.
#[inline]
pub fn dot(a: &[f32], b: &[f32]) -> f32 {
    #[cfg(target_arch = "x86_64")]
    if features().avx512f {
        // SAFETY: the CPU has AVX-512F (checked just above).
        return unsafe { dot_avx512(a, b) };
    }
    dot_any(a, b)
}

/// [`dot_any`] compiled for AVX-512.
///
/// # Safety
/// The CPU has AVX-512F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn dot_avx512(a: &[f32], b: &[f32]) -> f32 {
    dot_any(a, b)
}

#[inline(always)]
fn dot_any(a: &[f32], b: &[f32]) -> f32 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut acc = [0f32; 16];
    let mut ca = a.chunks_exact(16);
    let mut cb = b.chunks_exact(16);
    for (x, y) in (&mut ca).zip(&mut cb) {
        for l in 0..16 {
            acc[l] += x[l] * y[l];
        }
    }
    let mut s = 0f32;
    for (x, y) in ca.remainder().iter().zip(cb.remainder()) {
        s += x * y;
    }
    acc.iter().sum::<f32>() + s
}

/// u[i·w + j] = Σᵣ z[i·rank + r]·bt[r·stride + j] for the m = z.len() / rank rows of `z` and
/// the w = u.len() / m columns of `u`: the second product of a low-rank term, (x·Aᵀ)·Bᵀ, over
/// a block of B's outputs (`bt` is Bᵀ from the block's first output on, `stride` its row
/// length). Each sum runs over r in order, a multiply then an add per step, so it does not
/// depend on the block or on how many rows come with it. Vectorised along the outputs (with
/// AVX-512 when the CPU has it, the same sums).
pub fn low_rank_outputs(z: &[f32], rank: usize, bt: &[f32], stride: usize, u: &mut [f32]) {
    #[cfg(target_arch = "x86_64")]
    if features().avx512f {
        // SAFETY: the CPU has AVX-512F (checked just above).
        unsafe { low_rank_outputs_avx512(z, rank, bt, stride, u) };
        return;
    }
    low_rank_outputs_any(z, rank, bt, stride, u);
}

/// [`low_rank_outputs_any`] compiled for AVX-512.
///
/// # Safety
/// The CPU has AVX-512F.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn low_rank_outputs_avx512(
    z: &[f32],
    rank: usize,
    bt: &[f32],
    stride: usize,
    u: &mut [f32],
) {
    low_rank_outputs_any(z, rank, bt, stride, u);
}

#[inline(always)]
fn low_rank_outputs_any(z: &[f32], rank: usize, bt: &[f32], stride: usize, u: &mut [f32]) {
    if rank == 0 || z.is_empty() {
        u.fill(0.0);
        return;
    }
    let m = z.len() / rank;
    let w = u.len() / m;
    for (zi, ui) in z.chunks_exact(rank).zip(u.chunks_exact_mut(w)) {
        ui.fill(0.0);
        for (r, &zr) in zi.iter().enumerate() {
            let br = &bt[r * stride..r * stride + w];
            for (uo, &b) in ui.iter_mut().zip(br) {
                *uo += zr * b;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The panel layout: y = x·wᵀ against the textbook triple loop, one row and several, a
    /// partial last panel, on one task and on the pool.
    #[test]
    fn matmul_is_x_times_w_transposed() {
        for (n, inp, out) in [(3, 37, 5), (7, 301, 150)] {
            let x: Vec<f32> = (0..n * inp).map(|i| ((i * 7) % 11) as f32 - 5.0).collect();
            let w: Vec<f32> = (0..out * inp)
                .map(|i| ((i * 5) % 13) as f32 * 0.25)
                .collect();
            let wp = pack_panels(&w, out, inp);
            let mut y = vec![0.0; n * out];
            matmul(&x, n, inp, &wp, out, &mut y);
            for i in 0..n {
                for j in 0..out {
                    let want: f32 = (0..inp).map(|k| x[i * inp + k] * w[j * inp + k]).sum();
                    assert!((y[i * out + j] - want).abs() < 1e-3, "({i},{j})");
                }
            }
        }
    }

    /// Widening is exact, so 16-bit weights give bit for bit the f32 product over the widened
    /// weights: one row (pieces of 32 rows, an odd last row) and several (whole panel), a
    /// partial last panel, on one task and on the pool.
    #[test]
    fn half_weights_give_the_f32_product_of_the_widened_weights_exactly() {
        for (n, inp, out) in [
            (1, 37, 5),
            (1, 301, 150),
            (3, 37, 5),
            (4, 301, 300),
            (1, 64, 64),
            (6, 129, 70),
            (8, 301, 150),
            (9, 301, 150),
            (27, 517, 70),
        ] {
            let x: Vec<f32> = (0..n * inp)
                .map(|i| ((i * 7) % 11) as f32 * 0.3 - 1.7)
                .collect();
            let raw: Vec<f32> = (0..out * inp)
                .map(|i| ((i * 5) % 13) as f32 * 0.173 - 1.01)
                .collect();
            let check = |wide: Vec<f32>, y_half: Vec<f32>| {
                let wp = pack_panels(&wide, out, inp);
                let mut want = vec![0.0; n * out];
                matmul(&x, n, inp, &wp, out, &mut want);
                let same = want
                    .iter()
                    .zip(&y_half)
                    .all(|(a, b)| a.to_bits() == b.to_bits());
                assert!(same, "n {n} inp {inp} out {out}");
            };
            let b: Vec<half::bf16> = raw.iter().map(|&v| half::bf16::from_f32(v)).collect();
            let mut bp = vec![half::bf16::ZERO; panel_len(out, inp)];
            pack_panels_into(&b, out, inp, &mut bp, 0);
            let mut y = vec![0.0; n * out];
            matmul_half(&x, n, inp, &bp, out, &mut y);
            check(b.iter().map(|v| v.to_f32()).collect(), y);
            let h: Vec<half::f16> = raw.iter().map(|&v| half::f16::from_f32(v)).collect();
            let mut hp = vec![half::f16::ZERO; panel_len(out, inp)];
            pack_panels_into(&h, out, inp, &mut hp, 0);
            let mut y = vec![0.0; n * out];
            matmul_half(&x, n, inp, &hp, out, &mut y);
            check(h.iter().map(|v| v.to_f32()).collect(), y);
        }
    }

    /// The summation the products promise, written out as a scalar loop: for each row and
    /// column, one chain of fused multiply-adds (IEEE 754 `fusedMultiplyAdd`, Rust's
    /// `f32::mul_add`) over k in order, from zero.
    fn documented_sums(x: &[f32], n: usize, inp: usize, w: &[f32], out: usize) -> Vec<f32> {
        let mut y = vec![0.0; n * out];
        for t in 0..n {
            for j in 0..out {
                let mut sum = 0f32;
                for k in 0..inp {
                    sum = x[t * inp + k].mul_add(w[j * inp + k], sum);
                }
                y[t * out + j] = sum;
            }
        }
        y
    }

    /// Every batch size sums every row as the scalar loop above does, so a row's result is
    /// bit for bit the one it gets alone (which is what lets rows of several model variants
    /// share a step, and a batch change nothing in any answer): f32, bf16 and f16, the
    /// many-rows loop (groups of up to 24 rows in passes of up to 6, a partial last group,
    /// spans of 64 inputs and a partial last span) and the portable few-rows loop over f32
    /// pieces (what block-quantised panels and CPUs without AVX-512 use), partial panels, no
    /// inputs at all, one task and the pool. Values spread over several binades, so that a
    /// product rounded before its add differs from the fused one (checked: the unfused loop
    /// fails).
    #[test]
    fn every_batch_sums_each_row_in_the_documented_order() {
        for (n, inp, out) in [
            (1, 37, 5),
            (2, 37, 5),
            (3, 0, 5),
            (3, 301, 150),
            (4, 64, 64),
            (4, 2048, 300),
            (5, 37, 5),
            (8, 2048, 130),
            (9, 513, 70),
            (25, 301, 65),
            (50, 129, 64),
        ] {
            let x: Vec<f32> = (0..n * inp)
                .map(|i| ((i * 7) % 11) as f32 * 0.3137 - 1.7 + (i % 5) as f32 * 1e-3)
                .collect();
            let raw: Vec<f32> = (0..out * inp)
                .map(|i| (((i * 5) % 13) as f32 * 0.173 - 1.01) * (1 + i % 3) as f32)
                .collect();
            let b: Vec<half::bf16> = raw.iter().map(|&v| half::bf16::from_f32(v)).collect();
            let wide: Vec<f32> = b.iter().map(|v| v.to_f32()).collect();
            let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
            let mut got = vec![0.0; n * out];
            matmul(&x, n, inp, &pack_panels(&raw, out, inp), out, &mut got);
            let want = documented_sums(&x, n, inp, &raw, out);
            assert_eq!(bits(&got), bits(&want), "f32 n {n} inp {inp} out {out}");
            // The portable few-rows loop, panel by panel, up to four rows at a time.
            let wp = pack_panels(&raw, out, inp);
            let stored = Stored { w: &wp, inp };
            for t0 in (0..n).step_by(FEW_ROWS) {
                let rows = (n - t0).min(FEW_ROWS);
                for p in 0..out.div_ceil(PANEL) {
                    let mut acc = [[0f32; PANEL]; FEW_ROWS];
                    let xs = &x[t0 * inp..(t0 + rows) * inp];
                    panel_rows_any(&mut acc[..rows], xs, inp, &stored, p);
                    for (t, a) in acc[..rows].iter().enumerate() {
                        let cols = p * PANEL..(p * PANEL + PANEL).min(out);
                        let w0 = (t0 + t) * out;
                        let want_cols = &want[w0 + cols.start..w0 + cols.end];
                        assert_eq!(bits(&a[..cols.len()]), bits(want_cols), "portable n {n}");
                    }
                }
            }
            let mut bp = vec![half::bf16::ZERO; panel_len(out, inp)];
            pack_panels_into(&b, out, inp, &mut bp, 0);
            matmul_half(&x, n, inp, &bp, out, &mut got);
            let want = documented_sums(&x, n, inp, &wide, out);
            assert_eq!(bits(&got), bits(&want), "bf16 n {n} inp {inp} out {out}");
            let h: Vec<half::f16> = raw.iter().map(|&v| half::f16::from_f32(v)).collect();
            let wide: Vec<f32> = h.iter().map(|v| v.to_f32()).collect();
            let mut hp = vec![half::f16::ZERO; panel_len(out, inp)];
            pack_panels_into(&h, out, inp, &mut hp, 0);
            matmul_half(&x, n, inp, &hp, out, &mut got);
            let want = documented_sums(&x, n, inp, &wide, out);
            assert_eq!(bits(&got), bits(&want), "f16 n {n} inp {inp} out {out}");
        }
    }

    #[test]
    fn dot_handles_every_length() {
        for n in [0, 1, 15, 16, 17, 64, 100] {
            let a: Vec<f32> = (0..n).map(|i| i as f32).collect();
            let want: f32 = a.iter().map(|v| v * v).sum();
            assert_eq!(dot(&a, &a), want, "length {n}");
        }
    }

    /// The dispatched dot (16-wide vectors where the CPU has AVX-512) sums exactly as the
    /// portable loop does, bit for bit, on lengths with and without a remainder.
    #[test]
    fn dot_is_the_portable_sum_bit_for_bit() {
        for n in [3, 16, 33, 250, 2048] {
            let a: Vec<f32> = (0..n)
                .map(|i| ((i * 7919) % 1013) as f32 * 1.37e-3 - 0.6)
                .collect();
            let b: Vec<f32> = (0..n)
                .map(|i| ((i * 104_729) % 977) as f32 * 2.9e-2 - 13.0)
                .collect();
            assert_eq!(
                dot(&a, &b).to_bits(),
                dot_any(&a, &b).to_bits(),
                "length {n}"
            );
        }
    }

    /// The low-rank term's second product against the plain loop, Σᵣ z·Bᵀ in r order, a
    /// multiply then an add per step: every row, every block of outputs (a partial last one
    /// included), bit for bit.
    #[test]
    fn low_rank_outputs_sum_each_output_over_the_rank_in_order() {
        let (m, rank, out) = (3, 5, 70);
        let z: Vec<f32> = (0..m * rank)
            .map(|i| ((i * 37) % 19) as f32 * 0.31 - 2.7)
            .collect();
        let bt: Vec<f32> = (0..rank * out)
            .map(|i| ((i * 53) % 101) as f32 * 1.3e-2 - 0.65)
            .collect();
        let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        let mut want = vec![0f32; m * out];
        for i in 0..m {
            for o in 0..out {
                let mut u = 0f32;
                for r in 0..rank {
                    u += z[i * rank + r] * bt[r * out + o];
                }
                want[i * out + o] = u;
            }
        }
        for block in [16, 32, 70] {
            for o0 in (0..out).step_by(block) {
                let width = block.min(out - o0);
                let mut u = vec![f32::NAN; m * width];
                low_rank_outputs(&z, rank, &bt[o0..], out, &mut u);
                for i in 0..m {
                    let w = &want[i * out + o0..i * out + o0 + width];
                    assert_eq!(
                        bits(&u[i * width..(i + 1) * width]),
                        bits(w),
                        "block {block} at {o0}"
                    );
                }
            }
        }
    }
}
