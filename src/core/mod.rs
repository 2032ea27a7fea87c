//! Pure-Rust kernels. Nothing in this module knows about Python.
//!
//! Every kernel:
//! * is generic over the storage float ([`Real`]: `f32` or `f64`) and
//!   accumulates in `f64`;
//! * reads inputs through `ndarray` views of any strides (a contiguous slice is
//!   only the fast path);
//! * takes its parallelism explicitly ([`Par`]) and produces bit-identical
//!   results for any thread count: work is split at data-defined boundaries;
//! * reports bad input as a [`CoreError`] naming the argument and the first
//!   offending index, never by panicking.

pub mod error;
pub mod fastmath;
pub mod finite;
pub mod float;
pub mod heads;
pub mod par;
pub mod policy;
pub mod ragged;
pub mod rows;
pub mod running;
pub mod scan;
pub mod simd;
pub mod stats;
pub mod timemajor;
pub mod vtrace;

pub use error::{At, CoreError, CoreResult};
pub use float::Real;
pub use par::Par;
