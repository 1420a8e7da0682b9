//! (filled in by its stage's work)
