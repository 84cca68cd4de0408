//! The `bound` and `plan` commands (being written).
