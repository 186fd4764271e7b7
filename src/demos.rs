//! The demo traces shipped in traces/, generated here so that a test can
//! regenerate them and check the committed files still match.

use crate::dtype::Dtype;
use crate::record::Tape;
use crate::trace::TraceFile;

/// The teaching trace: a market stall's profit at one price.
///
/// Demand falls exponentially with price, q = exp(−s·p); profit is the margin
/// times demand minus a storage cost growing with the square of demand:
/// profit = (p − c)·q − k·q². The price `p` feeds two nodes (a branch point),
/// and demand `q` feeds both inputs of one multiply (a second branch point,
/// one input used twice). Twelve nodes, small enough to step by hand.
pub fn teaching() -> TraceFile {
    let mut tape = Tape::new("market stall: profit at one price", Dtype::F64);
    tape.describe("A stall sells at price p with demand q = exp(-s*p); profit = (p - c)*q - k*q^2. Step it to watch p and q collect adjoints from two branches.");
    let (price, cost, sensitivity, storage) = tape.scoped("inputs", |tape| {
        (tape.param("price", 2.5), tape.input("unit_cost", 1.0), tape.param("sensitivity", 0.4), tape.constant("storage_rate", 0.1))
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
        let profit = tape.sub(revenue, storage_cost);
        tape.rename(profit, "profit")
    });
    tape.finish(profit)
}

/// Every demo: file name in traces/ and its generator.
pub fn all() -> Vec<(&'static str, TraceFile)> {
    vec![("teaching.ron", teaching())]
}
