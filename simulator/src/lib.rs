//! Plant simulator for Spillway: sun, PV array, household, loads, battery and meters.

pub mod pv_output;
pub mod quantity;
