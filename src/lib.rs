//! Ebb: load a recorded trace of one training or evaluation step, replay its
//! reverse sweep node by node, and point at where a bad gradient was born.

pub mod closest;
pub mod control;
pub mod demos;
pub mod diagnose;
pub mod dtype;
pub mod eval;
pub mod format;
pub mod listing;
pub mod ops;
pub mod random;
pub mod record;
pub mod report;
pub mod stats;
pub mod sweep;
pub mod tensor;
pub mod trace;
pub mod tui;
pub mod verify;
