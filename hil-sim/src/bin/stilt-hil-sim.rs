//! stilt-hil-sim: placeholder until the pty server lands.

fn main() {}
