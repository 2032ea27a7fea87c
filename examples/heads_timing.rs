//! Time the fused log-prob + entropy heads without Python (a development aid:
//! `cargo run --release --example heads_timing`; `-- once` runs each case a
//! single time, for `valgrind --tool=callgrind`). The benchmarks of record
//! are `rollscan bench --only heads`.

use ndarray::{Array1, Array2};
use rollscan::core::heads::categorical::{categorical, CatOut, Logits, Out, Pick};
use rollscan::core::heads::gaussian::{gaussian, GaussOut, LogStd, Normal};
use rollscan::core::Par;
use std::time::Instant;

/// Median time of one call in microseconds over `reps` calls.
fn time<F: FnMut()>(reps: usize, mut f: F) -> f64 {
    for _ in 0..reps.min(20) {
        f();
    }
    let mut t: Vec<f64> = (0..reps)
        .map(|_| {
            let t0 = Instant::now();
            f();
            t0.elapsed().as_secs_f64() * 1e6
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[reps / 2]
}

/// One call on one thread (`once`, for callgrind), or the median times of
/// `reps` calls on 1 and 2 threads, printed as `what`.
fn report(
    what: &str,
    once: bool,
    reps: usize,
    pool: &rayon::ThreadPool,
    mut call: impl FnMut(Par) + Send,
) {
    if once {
        call(Par::Seq);
        return;
    }
    let s = time(reps, || call(Par::Seq));
    let p = pool.install(|| time(reps, || call(Par::Rayon)));
    println!("{what} f32: 1 thread {s:.2} us, 2 threads {p:.2} us");
}

fn lcg(s: &mut u64) -> f32 {
    *s = s
        .wrapping_mul(6364136223846793005)
        .wrapping_add(1442695040888963407);
    ((*s >> 40) as f32) / ((1u64 << 24) as f32) * 4.0 - 2.0
}

fn main() {
    let once = std::env::args().any(|a| a == "once");
    let only = std::env::args().nth(1).filter(|a| a != "once");
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(2)
        .build()
        .expect("a pool");
    let mut seed = 7u64;
    for &(b, k) in &[(64usize, 6usize), (100_000, 18)] {
        if only.as_deref().is_some_and(|o| o != "cat") {
            break;
        }
        let x = Array2::from_shape_fn((b, k), |_| lcg(&mut seed));
        let a = Array1::from_shape_fn(b, |i| ((i * 7919) % k) as i64).into_dyn();
        let (mut lp, mut h) = (Array1::<f32>::zeros(b), Array1::<f32>::zeros(b));
        let lg = Logits {
            logits: x.view().into_dyn(),
            mask: None,
            check_finite: true,
        };
        let mut call = |par| {
            categorical(
                &lg,
                Some(a.view()),
                Pick::Nothing,
                CatOut {
                    log_prob: Some(Out::new("out[0]", lp.view_mut().into_dyn())),
                    entropy: Some(Out::new("out[1]", h.view_mut().into_dyn())),
                    ..Default::default()
                },
                par,
            )
            .expect("valid input")
        };
        let reps = if b < 1000 { 20_000 } else { 200 };
        report(
            &format!("categorical ({b}, {k})"),
            once,
            reps,
            &pool,
            |par| {
                call(par);
            },
        );
    }
    for &(b, d) in &[(64usize, 6usize), (1_000_000, 6)] {
        if only.as_deref().is_some_and(|o| o != "gauss") {
            break;
        }
        let m = Array2::from_shape_fn((b, d), |_| lcg(&mut seed));
        let act = Array2::from_shape_fn((b, d), |_| lcg(&mut seed));
        let ls: Vec<f64> = (0..d).map(|j| 0.1 * j as f64 - 0.2).collect();
        let (mut lp, mut h) = (Array1::<f32>::zeros(b), Array1::<f32>::zeros(b));
        let nrm = Normal {
            mean: m.view().into_dyn(),
            log_std: LogStd::Shared(ls),
            check_finite: true,
        };
        let mut call = |par| {
            gaussian(
                &nrm,
                Some(act.view().into_dyn()),
                None,
                GaussOut {
                    log_prob: Some(Out::new("out[0]", lp.view_mut().into_dyn())),
                    entropy: Some(Out::new("out[1]", h.view_mut().into_dyn())),
                    ..Default::default()
                },
                par,
            )
            .expect("valid input")
        };
        let reps = if b < 1000 { 20_000 } else { 50 };
        report(&format!("gaussian ({b}, {d})"), once, reps, &pool, |par| {
            call(par);
        });
    }
}
