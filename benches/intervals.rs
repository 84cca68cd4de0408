//! Benchmark of interval computation (filled in below).
fn main() {}
