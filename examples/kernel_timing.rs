//! Time the pure-Rust kernels without Python (a development aid: run with
//! `cargo run --release --example kernel_timing`). The benchmarks of record
//! are `rollscan bench`; this only separates kernel time from call overhead.
//! `-- --ragged` times the 10^7-step ragged cases instead (`-- --ragged --once
//! [--only=many|one]`: one call each on one thread, for `valgrind --tool=cachegrind --cache-sim=yes`).

use ndarray::{Array1, Array2};
use rollscan::core::ragged::{self, Pieces};
use rollscan::core::timemajor::{discounted_returns, gae, Steps};
use rollscan::core::Par;
use std::time::Instant;

fn time<F: FnMut()>(f: F) -> f64 {
    time_n(2000, f)
}

/// Mean microseconds per call over `n` calls, after a warm-up.
fn time_n<F: FnMut()>(n: usize, mut f: F) -> f64 {
    for _ in 0..n.div_ceil(40) {
        f();
    }
    let t0 = Instant::now();
    for _ in 0..n {
        f();
    }
    t0.elapsed().as_secs_f64() / n as f64 * 1e6
}

/// Ragged discounted returns over 10^7 float32 steps into a preallocated
/// output, on 2 threads: episodes of 1..1000 steps, and one episode alone;
/// beside the time of copying 4 bytes per step (a read and a write).
fn ragged_timing(once: bool) {
    let n = 10_000_000usize;
    let r = Array1::from_shape_fn(n, |i| ((i * 31) % 23) as f32 * 0.1 - 1.0);
    let mut out = Array1::<f32>::zeros(n);
    let mut many = Vec::new();
    let (mut left, mut seed) = (n as i64, 12345u64);
    while left > 0 {
        seed = seed
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        let l = ((seed >> 33) % 1000 + 1) as i64;
        many.push(l.min(left));
        left -= l.min(left);
    }
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .unwrap();
    let mut dst = vec![0.0f32; n];
    let copy = if once {
        1.0
    } else {
        pool.install(|| {
            use rayon::prelude::*;
            time_n(40, || {
                dst.par_chunks_mut(1 << 16)
                    .zip(r.as_slice().unwrap().par_chunks(1 << 16))
                    .for_each(|(d, s)| d.copy_from_slice(s))
            })
        })
    };
    let only = std::env::args().find_map(|a| a.strip_prefix("--only=").map(str::to_owned));
    for (name, lengths) in [("many episodes", many), ("one episode", vec![n as i64])] {
        if only.as_deref().is_some_and(|o| !name.starts_with(o)) {
            continue;
        }
        let l = Array1::from(lengths);
        let p = Pieces::<f32>::new(l.view(), n, None, None, None, true).unwrap();
        let mut run = |par| {
            ragged::discounted_returns(r.view(), &p, 0.99, true, out.view_mut(), par).unwrap()
        };
        if once {
            // One call on one thread, for instruction and cache-miss counts.
            run(Par::Seq);
            continue;
        }
        let seq = time_n(10, || run(Par::Seq));
        let us = pool.install(|| time_n(40, || run(Par::Rayon)));
        println!(
            "ragged returns 10^7 f32, {name}: {:.2} ms ({:.2} ns/step, {:.2}x a 2-thread copy of {:.2} ms); 1 thread {:.2} ms",
            us / 1e3,
            us * 1e3 / n as f64,
            us / copy,
            copy / 1e3,
            seq / 1e3
        );
    }
}

fn main() {
    if std::env::args().any(|a| a == "--ragged") {
        return ragged_timing(std::env::args().any(|a| a == "--once"));
    }
    for &(t, m) in &[(128usize, 8usize), (1024, 8), (128, 64), (2048, 64)] {
        let r = Array2::from_shape_fn((t, m), |(i, j)| ((i * 31 + j * 17) % 23) as f32 * 0.1 - 1.0);
        let v = Array2::from_shape_fn((t, m), |(i, j)| ((i * 7 + j) % 11) as f32 * 0.2);
        let te = Array2::from_shape_fn((t, m), |(i, j)| (i * 13 + j * 5) % 97 == 0);
        let boot = Array1::from_shape_fn(m, |j| j as f32);
        let steps = Steps {
            values: Some(v.view()),
            terminated: Some(te.view()),
            bootstrap: Some(boot.view()),
            ..Steps::new(r.view())
        };
        let mut a = Array2::zeros((t, m));
        let mut b = Array2::zeros((t, m));
        let g = time(|| {
            gae(
                &steps,
                0.99,
                0.95,
                None,
                true,
                a.view_mut(),
                b.view_mut(),
                Par::Seq,
            )
            .unwrap()
        });
        let d = time(|| discounted_returns(&steps, 0.99, true, a.view_mut(), Par::Seq).unwrap());
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(2)
            .build()
            .unwrap();
        let gp = pool.install(|| {
            time(|| {
                gae(
                    &steps,
                    0.99,
                    0.95,
                    None,
                    true,
                    a.view_mut(),
                    b.view_mut(),
                    Par::Rayon,
                )
                .unwrap()
            })
        });
        let n = (t * m) as f64;
        println!(
            "({t}, {m}): gae {g:.2} us ({:.2} ns/elem), 2 threads {gp:.2} us; returns {d:.2} us ({:.2} ns/elem)",
            g * 1e3 / n,
            d * 1e3 / n
        );
    }
}
