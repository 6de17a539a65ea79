//! Helpers for stilt's system tests, which run the real binaries.
