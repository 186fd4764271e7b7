//! The loops behind the op rules, over typed storage: matrix products through
//! a GEMM crate (`gemm`), elementwise maps and broadcast sums split over
//! output elements across threads (`map`).
//!
//! Every kernel gives the same bits on one thread and on many: work is split
//! over output elements, never along a sum (the ledger, undo and the replays
//! compare sweeps bit for bit).

pub mod gemm;
pub mod im2col;
pub mod map;

/// Elements below which work stays on the calling thread: splitting costs
/// more than it gains on small tensors (measured; see benches/network.rs).
pub const PARALLEL_THRESHOLD: usize = 1 << 15;

/// Elements handled per task and per widening buffer.
pub const CHUNK: usize = 1 << 12;
