//! The one error type of glint-science. Every fallible function checks its arguments up front and names the
//! argument and the accepted range, so the daemon can report a bad config or a bad request precisely
//! instead of carrying a NaN into an alert.

use crate::instrument::SpecProblem;

/// What went wrong in a science computation.
#[derive(thiserror::Error, Debug, Clone, PartialEq)]
pub enum ScienceError {
    /// An argument is NaN, infinite or outside its domain.
    #[error("{name} = {value} is invalid: expected {expected}")]
    InvalidArgument {
        /// The argument's name as in the function signature (e.g. `mass_g`).
        name: &'static str,
        /// The value passed.
        value: f64,
        /// The accepted range, in words (e.g. "a finite number > 0").
        expected: &'static str,
    },
    /// An instrument block failed its checks; every problem is listed.
    #[error("invalid instrument description: {}", join_problems(.problems))]
    InvalidSpec {
        /// One entry per fault, each naming its key.
        problems: Vec<SpecProblem>,
    },
    /// A result does not fit the type it is returned in (e.g. a critical count above `u32::MAX`).
    #[error("{what} is out of range: {detail}")]
    OutOfRange {
        /// The quantity that overflowed.
        what: &'static str,
        /// Why, with the numbers involved.
        detail: String,
    },
    /// An iterative method stopped without meeting its tolerance.
    #[error("{what} did not converge")]
    NoConvergence {
        /// The computation that failed.
        what: &'static str,
    },
}

fn join_problems(problems: &[SpecProblem]) -> String {
    let parts: Vec<String> = problems.iter().map(ToString::to_string).collect();
    parts.join("; ")
}

/// Argument checks shared by the modules; each returns the value unchanged when it is acceptable.
pub(crate) mod arg {
    use super::ScienceError;

    fn bad(name: &'static str, value: f64, expected: &'static str) -> ScienceError {
        ScienceError::InvalidArgument {
            name,
            value,
            expected,
        }
    }

    /// Finite and strictly positive.
    pub(crate) fn positive(name: &'static str, v: f64) -> Result<f64, ScienceError> {
        if v.is_finite() && v > 0.0 {
            Ok(v)
        } else {
            Err(bad(name, v, "a finite number > 0"))
        }
    }

    /// Finite and not negative.
    pub(crate) fn non_negative(name: &'static str, v: f64) -> Result<f64, ScienceError> {
        if v.is_finite() && v >= 0.0 {
            Ok(v)
        } else {
            Err(bad(name, v, "a finite number >= 0"))
        }
    }

    /// A probability strictly between 0 and 1 (a confidence level, say).
    pub(crate) fn open_unit(name: &'static str, v: f64) -> Result<f64, ScienceError> {
        if v > 0.0 && v < 1.0 {
            Ok(v)
        } else {
            Err(bad(name, v, "a number strictly between 0 and 1"))
        }
    }

    /// Finite, any sign.
    pub(crate) fn finite(name: &'static str, v: f64) -> Result<f64, ScienceError> {
        if v.is_finite() {
            Ok(v)
        } else {
            Err(bad(name, v, "a finite number"))
        }
    }

    /// Finite and within `[lo, hi]`.
    pub(crate) fn within(
        name: &'static str,
        v: f64,
        lo: f64,
        hi: f64,
        expected: &'static str,
    ) -> Result<f64, ScienceError> {
        if v.is_finite() && v >= lo && v <= hi {
            Ok(v)
        } else {
            Err(bad(name, v, expected))
        }
    }
}
