//! The demo traces shipped in traces/, generated here from fixed seeds so
//! that a test can regenerate them and check the committed files still match.
//! Each scenario is our own invention and carries a one-line story in its
//! description.

pub mod exploding;
mod medium;
mod nan_hunt;
pub mod networks;
mod rng;
mod underflow;
mod vanishing;
mod wrong_partial;

pub use exploding::exploding;
pub use medium::medium;
pub use nan_hunt::nan_hunt;
pub use rng::{SplitMix64, glorot_limit};
pub use underflow::{underflow, underflow_in};
pub use vanishing::vanishing;
pub use wrong_partial::{GATE, wrong_partial, wrong_partial_with};

use crate::dtype::Dtype;
use crate::record::{Tape, Var};
use crate::tensor::Value;
use crate::trace::TraceFile;

/// The teaching trace: a market stall's profit at one price.
///
/// Demand falls exponentially with price, q = exp(−s·p); profit is the
/// margin times demand minus the costs, a storage cost growing with the
/// square of demand plus a pitch fee per customer:
/// profit = (p − c)·q − (k·q² + f·q). The price `p` feeds two nodes (a
/// branch point); demand `q` is used by three nodes, one of which uses it
/// twice (q·q), so its adjoint collects four contributions; the costs are an
/// add, which passes its adjoint on unchanged. Fifteen nodes, small enough
/// to step by hand.
pub fn teaching() -> TraceFile {
    let mut tape = Tape::new("market stall: profit at one price", Dtype::F64);
    tape.describe("A stall sells at price p with demand q = exp(-s*p); profit = (p - c)*q - (k*q^2 + f*q). Step it to watch q collect adjoints from three nodes, one of them using it twice.");
    let (price, cost, sensitivity, storage, fee_rate) = tape.scoped("inputs", |tape| {
        (
            tape.param("price", 2.5),
            tape.input("unit_cost", 1.0),
            tape.param("sensitivity", 0.4),
            tape.constant("storage_rate", 0.1),
            tape.constant("fee_rate", 0.05),
        )
    });
    let demand = tape.scoped("demand", |tape| {
        let exponent = tape.mul(sensitivity, price);
        let exponent = tape.rename(exponent, "s_times_p");
        let negated = tape.neg(exponent);
        let negated = tape.rename(negated, "minus_sp");
        let demand = tape.exp(negated);
        tape.rename(demand, "demand")
    });
    let profit = tape.scoped("profit", |tape| {
        let margin = tape.sub(price, cost);
        let margin = tape.rename(margin, "margin");
        let revenue = tape.mul(margin, demand);
        let revenue = tape.rename(revenue, "gross");
        let square = tape.mul(demand, demand);
        let square = tape.rename(square, "demand_sq");
        let storage_cost = tape.mul(storage, square);
        let storage_cost = tape.rename(storage_cost, "storage");
        let fee = tape.mul(fee_rate, demand);
        let fee = tape.rename(fee, "fee");
        let costs = tape.add(storage_cost, fee);
        let costs = tape.rename(costs, "costs");
        let profit = tape.sub(revenue, costs);
        tape.rename(profit, "profit")
    });
    tape.finish(profit)
}

/// Every demo: file name in traces/ (the extension picks the form) and its trace.
pub fn all() -> Vec<(&'static str, TraceFile)> {
    vec![
        ("teaching.ron", teaching()),
        ("nan_hunt.ron", nan_hunt()),
        ("vanishing.ron", vanishing()),
        ("exploding.ron", exploding()),
        ("underflow_f16.ron", underflow()),
        ("wrong_partial.ron", wrong_partial()),
        ("dropout.ron", dropout()),
        ("attention.ron", attention()),
        ("medium.tape", medium()),
    ]
}

/// A parameter tensor of `shape` drawn uniform in [−limit, limit).
#[track_caller]
fn param_tensor(
    tape: &mut Tape,
    rng: &mut SplitMix64,
    name: &str,
    shape: &[usize],
    limit: f64,
) -> Var {
    let data = rng.fill(shape.iter().product(), limit);
    tape.param(name, Value::from_parts(shape.to_vec(), data))
}

/// A dense layer `x @ w + b` with Glorot-uniform weights and zero-centred
/// small biases, recorded in the current scope under readable ids.
#[track_caller]
fn dense(
    tape: &mut Tape,
    rng: &mut SplitMix64,
    prefix: &str,
    x: Var,
    fan_in: usize,
    fan_out: usize,
) -> Var {
    let limit = glorot_limit(fan_in, fan_out);
    let w = param_tensor(tape, rng, &format!("{prefix}.w"), &[fan_in, fan_out], limit);
    let b = param_tensor(tape, rng, &format!("{prefix}.b"), &[fan_out], 0.1);
    let product = tape.matmul(x, w);
    let product = tape.rename(product, &format!("{prefix}.xw"));
    let sum = tape.add(product, b);
    tape.rename(sum, &format!("{prefix}.pre"))
}

// Declared here, after the teaching demo, so that adding a scenario does not
// move the teaching demo's recorded sites (traces/teaching.ron).
mod attention;
mod dropout;
pub use attention::attention;
pub use dropout::{DROP, dropout};
