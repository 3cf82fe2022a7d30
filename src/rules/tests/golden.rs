//! Golden error messages.
