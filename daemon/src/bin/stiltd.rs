//! stiltd.
fn main() {}
