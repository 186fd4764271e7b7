//! The NaN hunt: a greenhouse humidity model whose hand-written loss takes
//! the log of a probability that reaches exactly 0.

use super::{SplitMix64, dense};
use crate::dtype::Dtype;
use crate::record::Tape;
use crate::tensor::Value;
use crate::trace::TraceFile;

/// Sensor readings per row: air temperature (scaled °C/40), light (scaled
/// klux/100), soil moisture (fraction) and vent opening (fraction). Row 4's
/// light sensor was swapped for a model that reports raw lux: 1250 instead
/// of 0.0125 · 100.
const READINGS: [[f64; 4]; 6] = [
    [0.55, 0.42, 0.31, 0.20],
    [0.61, 0.58, 0.28, 0.35],
    [0.48, 0.12, 0.44, 0.05],
    [0.70, 0.81, 0.22, 0.60],
    [0.52, 1250.0, 0.37, 0.15],
    [0.45, 0.05, 0.51, 0.00],
];

/// Measured relative humidity as a fraction, the regression target.
const HUMIDITY: [f64; 6] = [0.71, 0.64, 0.83, 0.52, 0.69, 0.88];

/// A small f32 network predicting a greenhouse's relative humidity p = σ(z)
/// from four sensors, with the binary cross-entropy written out by hand:
/// −mean(h·ln p + (1 − h)·ln(1 − p)). One unscaled reading drives z so far
/// negative that p rounds to exactly 0 in f32 and ln p is −inf; in the sweep
/// the sigmoid's partial p(1 − p) = 0 meets that infinity and makes NaN.
pub fn nan_hunt() -> TraceFile {
    let mut tape = Tape::new("greenhouse humidity: a loss that takes ln 0", Dtype::F32);
    tape.describe(
        "One light sensor reports raw lux (1250) instead of a scaled reading; the predicted humidity collapses to exactly 0 in f32 and the hand-written loss takes ln p = ln 0.",
    );
    let mut rng = SplitMix64::new(0x6EE0_4A55);
    let (readings, humidity) = tape.scoped("sensors", |tape| {
        let readings = tape.input("readings", Value::from_parts(vec![6, 4], READINGS.concat()));
        let humidity = tape.input("humidity", Value::from_parts(vec![6, 1], HUMIDITY.to_vec()));
        (readings, humidity)
    });
    let predicted = tape.scoped("model", |tape| {
        let hidden = tape.scoped("hidden", |tape| {
            let pre = dense(tape, &mut rng, "hidden", readings, 4, 5);
            let hidden = tape.relu(pre);
            tape.rename(hidden, "hidden.relu")
        });
        tape.scoped("out", |tape| {
            let z = dense(tape, &mut rng, "out", hidden, 5, 1);
            let p = tape.sigmoid(z);
            tape.rename(p, "predicted")
        })
    });
    let loss = tape.scoped("loss", |tape| {
        let one = tape.constant("one", 1.0);
        let log_p = tape.log(predicted);
        let log_p = tape.rename(log_p, "ln_p");
        let dry = tape.sub(one, predicted);
        let dry = tape.rename(dry, "one_minus_p");
        let log_dry = tape.log(dry);
        let log_dry = tape.rename(log_dry, "ln_one_minus_p");
        let humid_term = tape.mul(humidity, log_p);
        let humid_term = tape.rename(humid_term, "h_ln_p");
        let dry_weight = tape.sub(one, humidity);
        let dry_weight = tape.rename(dry_weight, "one_minus_h");
        let dry_term = tape.mul(dry_weight, log_dry);
        let dry_term = tape.rename(dry_term, "dry_term");
        let both = tape.add(humid_term, dry_term);
        let both = tape.rename(both, "log_likelihood");
        let mean = tape.mean(both);
        let mean = tape.rename(mean, "mean_log_likelihood");
        let loss = tape.neg(mean);
        tape.rename(loss, "loss")
    });
    tape.finish(loss)
}
