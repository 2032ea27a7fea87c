//! Why one very long ragged episode costs more per step than many short
//! ones, on one thread, in pure Rust (a development aid: run with
//! `cargo run --release --example ragged_fusion_probe`).
//!
//! A long episode needs, per block of the parallel scan, a *map* (the
//! block's first output with zero carry, `scan::run_first`) before the
//! block's *scan* (`scan::run`). Four ways to move 10^7 float32 steps:
//!
//! * `onepass`: one scan over everything (what many short episodes cost:
//!   their maps are short);
//! * `blocked`: per block, the map and then the scan (what the kernel did
//!   for one episode before the fused path, and still does for GAE): the
//!   map's loads and the scan's stores do not overlap;
//! * `scan-cold-out`: only the scans' stores (inputs from one cached block);
//! * `fused`: the scan of block `b` and the map of block `b - 1` in one
//!   loop (`scan::run_with_first`), so loads and stores overlap: what a
//!   worker of the kernel does for discounted returns inside a long piece,
//!   mapping the block it claimed next while it scans the current one.
//!
//! It prints milliseconds per sweep and each as a multiple of `onepass`;
//! with a case's name as argument it runs that case alone (for a profiler).

use rollscan::core::scan::{run, run_first, run_with_first, Run8, SliceSink, SliceTerms};
use rollscan::core::simd::{dispatch, Kernel};
use std::time::Instant;

/// Inputs from `x`, outputs into `y`, both from step 0.
fn terms(x: &[f32]) -> SliceTerms<'_, f32> {
    SliceTerms { xs: x, base: 0 }
}
fn sink(y: &mut [f32]) -> SliceSink<'_, f32> {
    SliceSink::new(y, 0)
}

/// Steps per block, as in `core::ragged::BLOCK`.
const B: usize = rollscan::core::ragged::BLOCK;

#[derive(Clone, Copy)]
enum Case {
    OnePass,
    Blocked,
    ScanColdOut,
    Fused,
}

struct Sweep<'a> {
    case: Case,
    k: &'a Run8,
    x: &'a [f32],
    y: &'a mut [f32],
}

impl Kernel for Sweep<'_> {
    type Output = f64;
    #[inline(always)]
    fn run<const FMA: bool>(self) -> f64 {
        let Sweep { case, k, x, y } = self;
        let nb = x.len() / B;
        let mut carry = 0.0;
        let mut maps = 0.0;
        match case {
            Case::OnePass => carry = run::<FMA, _, _>(k, &terms(x), &mut sink(y), 0, nb * B, 0.0),
            Case::Blocked | Case::ScanColdOut => {
                for b in (0..nb).rev() {
                    let lo = b * B;
                    let out = &mut y[lo..lo + B];
                    let xb = match case {
                        Case::Blocked => {
                            maps += run_first::<FMA, _>(k, &terms(x), lo, lo + B, 0.0);
                            &x[lo..lo + B]
                        }
                        _ => &x[..B],
                    };
                    carry = run::<FMA, _, _>(k, &terms(xb), &mut sink(out), 0, B, carry);
                }
            }
            Case::Fused => {
                maps = run_first::<FMA, _>(k, &terms(x), (nb - 1) * B, nb * B, 0.0);
                for b in (1..nb).rev() {
                    let lo = b * B;
                    let (c, m, _) = run_with_first::<FMA, f32>(
                        k,
                        &x[lo..lo + B],
                        &mut y[lo..lo + B],
                        carry,
                        &x[lo - B..lo],
                    );
                    carry = c;
                    maps += m;
                }
                carry = run::<FMA, _, _>(k, &terms(x), &mut sink(y), 0, B, carry);
            }
        }
        carry + maps
    }
}

fn main() {
    let n = 10_000_000 / B * B;
    let x: Vec<f32> = (0..n).map(|i| ((i * 31) % 23) as f32 * 0.1 - 1.0).collect();
    let mut y = vec![0.0f32; n];
    let k = Run8::new(0.99);
    let cases = [
        ("onepass", Case::OnePass),
        ("blocked", Case::Blocked),
        ("scan-cold-out", Case::ScanColdOut),
        ("fused", Case::Fused),
    ];
    // One case alone, by name (for a profiler), or all of them.
    let only = std::env::args().nth(1);
    let cases: Vec<_> = cases
        .into_iter()
        .filter(|(name, _)| only.as_deref().is_none_or(|o| o == *name))
        .collect();
    for round in 0..3 {
        let mut ms = Vec::new();
        for &(_, case) in &cases {
            let reps = 30;
            let t0 = Instant::now();
            let mut s = 0.0;
            for _ in 0..reps {
                s += dispatch(Sweep {
                    case,
                    k: &k,
                    x: &x,
                    y: &mut y,
                });
            }
            std::hint::black_box(s);
            ms.push(t0.elapsed().as_secs_f64() / reps as f64 * 1e3);
        }
        let row: Vec<String> = cases
            .iter()
            .zip(&ms)
            .map(|((name, _), t)| format!("{name} {t:.2} ms ({:.2}x)", t / ms[0]))
            .collect();
        println!("round {round}: {}", row.join(", "));
    }
}
