//! Plant simulator.
