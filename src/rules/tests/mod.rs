//! Tests of the rule language as a user meets it: compile text, evaluate it tick by
//! tick, read it back. They go through the public API only, so the internals can change.

mod analysis;
mod behaviour;
mod dst;
mod golden;
mod props;
mod support;
