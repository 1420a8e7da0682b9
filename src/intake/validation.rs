//! What can be wrong with one field of a request, typed: every route and
//! command checks its input into these, and the HTTP layer maps them to codes
//! in one place (`server::error`).

use super::limits::Limit;
use crate::scoring::{BaselineError, GuardError, ScaleError};

/// A field of a request and what is wrong with it.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{field}: {problem}")]
pub struct Invalid {
    /// Path of the field, as `groups[3].captions[0]`.
    pub field: String,
    /// What is wrong and how to fix it.
    pub problem: Problem,
}

impl Invalid {
    pub fn new(field: impl Into<String>, problem: Problem) -> Invalid {
        Invalid {
            field: field.into(),
            problem,
        }
    }
}

/// The ways a field can be wrong.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum Problem {
    #[error("give at least one {0}")]
    Missing(&'static str),
    #[error("{0} must not be empty")]
    Blank(&'static str),
    #[error("{} is over the server's limit of {value} (raise it with {})", limit.what(), limit.flag())]
    OverLimit { limit: Limit, value: u64 },
    #[error("give exactly one of {0}")]
    OneOf(&'static str),
    #[error("{what} must be between {min} and {max}")]
    OutOfRange {
        what: &'static str,
        min: u64,
        max: u64,
    },
    #[error("not valid base64: {0}")]
    Base64(#[from] base64::DecodeError),
    #[error("{0:?} is not an image id (64 lower-case hex digits)")]
    ImageId(String),
    #[error("the vector has {got} numbers, the model's dimension is {want}")]
    VectorLength { got: usize, want: usize },
    #[error("the vector must be finite and not all zeros")]
    VectorValues,
    #[error("{0}")]
    Scale(#[from] ScaleError),
    #[error("{0}")]
    Baseline(#[from] BaselineError),
    #[error("{0}")]
    Guard(#[from] GuardError),
    #[error("tags must be 1 to {max} bytes of printable text")]
    Tag { max: usize },
    #[error("map names must match [A-Za-z0-9._-]+ (at most {max} characters)")]
    MapName { max: usize },
}

impl Problem {
    /// Over a server limit (answered `over_limit`, not `invalid_field`).
    pub fn is_over_limit(&self) -> bool {
        matches!(self, Problem::OverLimit { .. })
    }
}
