//! Spillway: a surplus load-diversion controller for solar sites that may not export.
//!
//! The crate mirrors the pipeline: `units` ← `rules` ← `config` ← `engine`, with
//! `sources` and `actuators` at the edges and `daemon` the only place that owns a
//! runtime. See `ARCHITECTURE.md` for the map and the invariants.

#![cfg_attr(not(test), deny(clippy::unwrap_used, clippy::expect_used))]

pub mod actuators;
pub mod config;
pub mod daemon;
pub mod diag;
pub mod engine;
pub mod offline;
pub mod rules;
pub mod sources;
pub mod status;
pub mod units;
