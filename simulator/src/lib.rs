//! Plant simulator for Spillway: sun, PV array, household, loads, battery and meters.

pub mod bus;
pub mod plant;
pub mod pv_output;
pub mod quantity;
