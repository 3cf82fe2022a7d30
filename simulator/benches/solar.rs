//! Benchmark placeholder replaced below.
fn main() {}
