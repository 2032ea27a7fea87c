//! The one error type of the core.
//!
//! The binding layer maps [`CoreError::Shape`] to `rollscan.ShapeError` and
//! [`CoreError::Input`] to `rollscan.InputError`; both subclass `ValueError`.

use std::fmt;

/// Where in an argument a bad value sits, in the coordinates the core sees.
/// The binding layer translates these back to the caller's own indexing
/// (original axis order, original shape).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum At {
    /// Index into a 1-D argument (a flat step, a piece, a row).
    Flat(usize),
    /// Time step `t` of stream `m` of a time-major buffer viewed as `[T, M]`.
    TimeStream(usize, usize),
    /// Element `j` of the last axis in row `i` of a `[rows, K]` view.
    RowCol(usize, usize),
}

/// A failure of a core kernel: always the caller's input, never a bug.
#[derive(Debug, Clone, PartialEq)]
pub enum CoreError {
    /// Shapes that do not line up. The message names both arguments and shapes.
    Shape(String),
    /// A bad value in an argument.
    Input {
        /// The argument's public name.
        arg: &'static str,
        /// The first offending index, if the problem is at an index.
        at: Option<At>,
        /// What is wrong, without the argument name or index.
        what: String,
    },
}

/// Result alias of the core.
pub type CoreResult<T> = Result<T, CoreError>;

impl CoreError {
    /// A shape mismatch between two named arguments.
    pub fn shape_mismatch(a: &str, sa: &[usize], b: &str, sb: &[usize], need: &str) -> Self {
        CoreError::Shape(format!(
            "{a} has shape {} but {b} has shape {}; {need}",
            fmt_shape(sa),
            fmt_shape(sb)
        ))
    }

    /// A bad value of `arg` at `at`.
    pub fn input_at(arg: &'static str, at: At, what: impl Into<String>) -> Self {
        CoreError::Input {
            arg,
            at: Some(at),
            what: what.into(),
        }
    }

    /// A bad argument with no particular index.
    pub fn input(arg: &'static str, what: impl Into<String>) -> Self {
        CoreError::Input {
            arg,
            at: None,
            what: what.into(),
        }
    }

    /// A non-finite value of `arg` at `at`.
    pub fn non_finite(arg: &'static str, at: At) -> Self {
        Self::input_at(
            arg,
            at,
            "is not finite (NaN or inf); pass check_finite=False to let it propagate",
        )
    }
}

/// `(2, 3)` / `(5,)` / `()` as NumPy prints shapes.
pub fn fmt_shape(s: &[usize]) -> String {
    match s.len() {
        0 => "()".to_string(),
        1 => format!("({},)", s[0]),
        _ => format!(
            "({})",
            s.iter()
                .map(|d| d.to_string())
                .collect::<Vec<_>>()
                .join(", ")
        ),
    }
}

impl fmt::Display for At {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            At::Flat(i) => write!(f, "[{i}]"),
            At::TimeStream(t, m) => write!(f, "[t={t}, stream={m}]"),
            At::RowCol(i, j) => write!(f, "[{i}, {j}]"),
        }
    }
}

impl fmt::Display for CoreError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            CoreError::Shape(m) => f.write_str(m),
            CoreError::Input {
                arg,
                at: Some(at),
                what,
            } => write!(f, "{arg}{at} {what}"),
            CoreError::Input {
                arg,
                at: None,
                what,
            } => write!(f, "{arg} {what}"),
        }
    }
}

impl std::error::Error for CoreError {}

/// `gamma` / `lam` style coefficients must be finite and in `[0, 1]`.
pub fn check_unit(arg: &'static str, x: f64) -> CoreResult<()> {
    if x.is_finite() && (0.0..=1.0).contains(&x) {
        Ok(())
    } else {
        Err(CoreError::input(arg, format!("must be in [0, 1], got {x}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn messages_name_argument_and_index() {
        let e = CoreError::non_finite("rewards", At::TimeStream(3, 1));
        assert!(e
            .to_string()
            .starts_with("rewards[t=3, stream=1] is not finite"));
        let s = CoreError::shape_mismatch("rewards", &[4, 2], "values", &[4], "they must match");
        assert_eq!(
            s.to_string(),
            "rewards has shape (4, 2) but values has shape (4,); they must match"
        );
        assert!(check_unit("gamma", 1.0).is_ok());
        assert!(check_unit("gamma", -0.1).is_err());
        assert!(check_unit("gamma", f64::NAN).is_err());
        assert_eq!(fmt_shape(&[]), "()");
    }
}
