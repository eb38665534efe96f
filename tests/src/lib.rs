//! Reference suite: see tests/*.rs.
