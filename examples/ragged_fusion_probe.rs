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
//! * `blocked`: per block, the map and then the scan (what the kernel does
//!   for one episode today): the map's loads and the scan's stores do not
//!   overlap;
//! * `scan-cold-out`: only the scans' stores (inputs from one cached block);
//! * `fused`: the scan of block `b` and the map of block `b - 1` in one
//!   loop (`scan::run_with_first`), so loads and stores overlap: a worker
//!   that maps its next block while it scans the current one.
//!
//! It prints milliseconds per sweep and each as a multiple of `onepass`.

use rollscan::core::scan::{run, run_first, run_with_first, Run8, Sink, Terms, W};
use rollscan::core::simd::{dispatch, F64x8, Kernel};
use std::time::Instant;

/// Steps per block, as in `core::ragged::BLOCK`.
const B: usize = rollscan::core::ragged::BLOCK;

struct Xs<'a>(&'a [f32]);
impl Terms for Xs<'_> {
    #[inline(always)]
    fn x8(&self, t: usize) -> F64x8 {
        cvt8(&self.0[t..t + W])
    }
    #[inline(always)]
    fn x1(&self, t: usize) -> f64 {
        self.0[t] as f64
    }
}

struct Ys<'a>(&'a mut [f32]);
impl Sink for Ys<'_> {
    #[inline(always)]
    fn put8(&mut self, t: usize, y: &F64x8) {
        for (d, v) in self.0[t..t + W].iter_mut().zip(y.0) {
            *d = v as f32;
        }
    }
    #[inline(always)]
    fn put1(&mut self, t: usize, y: f64) {
        self.0[t] = y as f32;
    }
    #[inline(always)]
    fn marks(&mut self, _: F64x8) {}
}

#[inline(always)]
fn cvt8(s: &[f32]) -> F64x8 {
    let mut o = F64x8::splat(0.0);
    for (d, &v) in o.0.iter_mut().zip(s) {
        *d = v as f64;
    }
    o
}

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
            Case::OnePass => carry = run::<FMA, _, _>(k, &Xs(x), &mut Ys(y), 0, nb * B, 0.0),
            Case::Blocked | Case::ScanColdOut => {
                for b in (0..nb).rev() {
                    let lo = b * B;
                    let out = &mut y[lo..lo + B];
                    let xb = match case {
                        Case::Blocked => {
                            maps += run_first::<FMA, _>(k, &Xs(x), lo, lo + B, 0.0);
                            &x[lo..lo + B]
                        }
                        _ => &x[..B],
                    };
                    carry = run::<FMA, _, _>(k, &Xs(xb), &mut Ys(out), 0, B, carry);
                }
            }
            Case::Fused => {
                maps = run_first::<FMA, _>(k, &Xs(x), (nb - 1) * B, nb * B, 0.0);
                for b in (1..nb).rev() {
                    let lo = b * B;
                    let (c, m) = run_with_first::<FMA, _, _, _>(
                        k,
                        &Xs(x),
                        &mut Ys(y),
                        lo,
                        lo + B,
                        carry,
                        &Xs(x),
                        lo - B,
                        lo,
                    );
                    carry = c;
                    maps += m;
                }
                carry = run::<FMA, _, _>(k, &Xs(x), &mut Ys(y), 0, B, carry);
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
