//! Sans-IO instrument protocols for stilt: bytes in, frames or values out.
//!
//! No I/O and no clocks live here: time is always a parameter.
