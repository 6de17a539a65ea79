//! stiltctl: the command-line client of the HTTP API (being written; prints nothing yet).

fn main() {}
