//! Time the pure-Rust kernels without Python (a development aid: run with
//! `cargo run --release --example kernel_timing`). The benchmarks of record
//! are `rollscan bench`; this only separates kernel time from call overhead.

use ndarray::{Array1, Array2};
use rollscan::core::timemajor::{discounted_returns, gae, Steps};
use rollscan::core::Par;
use std::time::Instant;

fn time<F: FnMut()>(mut f: F) -> f64 {
    for _ in 0..50 {
        f();
    }
    let n = 2000;
    let t0 = Instant::now();
    for _ in 0..n {
        f();
    }
    t0.elapsed().as_secs_f64() / n as f64 * 1e6
}

fn main() {
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
