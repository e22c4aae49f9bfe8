//! GFLOP/s of the f32 product over a panel-layout matrix (`kernels::dense::matmul`, the product
//! every linear layer runs), for one batch size and shape: `bench/kernels.sh` runs it over
//! several and compares two builds.
//!
//!   cargo run --release --example product_speed -- ROWS INPUTS OUTPUTS CALLS
//!
//! Prints one line: the shape, GFLOP/s (2·rows·inputs·outputs a call) and milliseconds a call,
//! after one untimed call; the thread count is rayon's (RAYON_NUM_THREADS).

use liftgate::kernels::dense::{matmul, pack_panels_into, panel_len};
use std::time::Instant;

fn main() {
    let args: Option<Vec<usize>> = std::env::args().skip(1).map(|a| a.parse().ok()).collect();
    let Some([n, inp, out, calls]) = args.and_then(|a| <[usize; 4]>::try_from(a).ok()) else {
        eprintln!("usage: product_speed ROWS INPUTS OUTPUTS CALLS (four whole numbers)");
        std::process::exit(2);
    };
    let w: Vec<f32> = (0..out * inp)
        .map(|i| ((i * 7919) % 1000) as f32 * 1e-3 - 0.5)
        .collect();
    let mut wp = vec![0f32; panel_len(out, inp)];
    pack_panels_into(&w, out, inp, &mut wp, 0);
    let x: Vec<f32> = (0..n * inp)
        .map(|i| ((i * 31) % 97) as f32 * 1e-2)
        .collect();
    let mut y = vec![0f32; n * out];
    matmul(&x, n, inp, &wp, out, &mut y);
    let t = Instant::now();
    for _ in 0..calls {
        matmul(&x, n, inp, &wp, out, &mut y);
    }
    let s = t.elapsed().as_secs_f64();
    let gflops = 2.0 * (n * inp * out * calls) as f64 / s / 1e9;
    println!(
        "rows {n} inputs {inp} outputs {out}: {gflops:.1} GFLOP/s, {:.3} ms a call",
        s * 1e3 / calls as f64
    );
}
