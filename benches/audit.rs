//! Placeholder until the audit benchmark lands.
fn main() {}
