//! rollscan: fast, exact post-processing of reinforcement-learning rollouts.
//!
//! The crate has two layers, and dependencies only point one way:
//!
//! * [`core`] — pure Rust kernels over `ndarray` views and slices. No PyO3
//!   types, every failure is a [`core::CoreError`]; `cargo test` exercises it
//!   without a Python interpreter.
//! * `bindings` — the thin PyO3 layer: extract and validate Python arguments,
//!   release the GIL, run the core on the crate's Rayon pool, map errors to
//!   the Python exception hierarchy.

pub mod core;

// The binding docs are Python docstrings (reST, `>>>` examples run by the
// Python suite), not Rust doctests.
#[cfg(not(doctest))]
mod bindings;
