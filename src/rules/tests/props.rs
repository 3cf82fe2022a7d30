//! Property tests.
