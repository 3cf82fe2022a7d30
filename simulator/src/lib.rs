//! Plant simulator for Spillway: sun, PV array, household, loads, battery and meters.

pub mod bus;
pub mod inverter;
pub mod plant;
pub mod pv;
pub mod pv_output;
pub mod quantity;
pub mod serve;
pub mod site;
pub mod sky;
pub mod sun;
pub mod transposition;
pub mod weather;
