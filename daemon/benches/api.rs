//! Benchmark of the HTTP API (being written).

fn main() {}
