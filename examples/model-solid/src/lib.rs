//! Reference model engine (being written).
