//! Diagnosis of small scenarios with known answers: closed-form gradients,
//! IEEE 754 limits and the worked cases of the mixed-precision and
//! gradient-clipping papers. Each check names its source beside it.

use ebb::diagnose::{
    ClipPreview, Diagnosis, Measure, OriginClass, Rule, Settings, Site, diagnose, loss_scale,
};
use ebb::dtype::{Dtype, Subnormals};
use ebb::ops::{Attrs, Op};
use ebb::record::{Tape, Var};
use ebb::trace::Trace;

fn build(tape: Tape, output: Var) -> Trace {
    Trace::try_from(tape.finish(output)).expect("a recorded tape is valid")
}

fn gradient(diagnosis: &Diagnosis, trace: &Trace, dtype: Dtype, id: &str) -> f64 {
    let param = trace.find(id).unwrap();
    diagnosis
        .replay_in(dtype)
        .unwrap()
        .gradients
        .iter()
        .find(|g| g.param == param)
        .unwrap()
        .norm
}

/// k sigmoid layers, each shifted by a bias of −1/2 so that every sigmoid is
/// evaluated at 0: z_i = s_{i−1} − 1/2, s_i = σ(z_i), with s_0 = x = 1/2.
fn sigmoid_chain(k: usize) -> Trace {
    let mut tape = Tape::new("sigmoid chain", Dtype::F64);
    let mut s = tape.scoped("input", |tape| tape.param("x", 0.5));
    for layer in 1..=k {
        s = tape.scoped(&format!("layer{layer}"), |tape| {
            let bias = tape.constant(&format!("bias{layer}"), 0.5);
            let z = tape.sub(s, bias);
            tape.sigmoid(z)
        });
    }
    build(tape, s)
}

// σ'(x) = σ(x)(1 − σ(x)) peaks at σ'(0) = 1/4 (Goodfellow, Bengio & Courville,
// "Deep Learning", MIT Press 2016, §6.3.2), so k layers at 0 give 0.25^k.
// f16's smallest subnormal is 2^-24 (IEEE 754-2019 table 3.5): 0.25^12 = 2^-24
// is representable, 0.25^13 = 2^-26 rounds to zero (below half of 2^-24).
#[test]
fn sigmoid_chain_underflows_in_f16_at_thirteen_layers() {
    let trace = sigmoid_chain(12);
    let diagnosis = diagnose(&trace, &Settings::default());
    assert_eq!(
        gradient(&diagnosis, &trace, Dtype::F64, "x"),
        0.25f64.powi(12)
    );
    assert_eq!(
        gradient(&diagnosis, &trace, Dtype::F16, "x"),
        2f64.powi(-24)
    );
    let x = trace.find("x").unwrap();
    let half = diagnosis.replay_in(Dtype::F16).unwrap();
    assert!(
        !half.at_node(x).any(|f| f.measure == Measure::FlushedToZero),
        "2^-24 survives in f16"
    );
    assert!(
        half.at_node(x)
            .any(|f| f.rule == Rule::Underflow && f.measure == Measure::Subnormal),
        "but it is subnormal"
    );

    let trace = sigmoid_chain(13);
    let diagnosis = diagnose(&trace, &Settings::default());
    let x = trace.find("x").unwrap();
    assert_eq!(gradient(&diagnosis, &trace, Dtype::F16, "x"), 0.0);
    let half = diagnosis.replay_in(Dtype::F16).unwrap();
    let flushed = half
        .at_node(x)
        .find(|f| f.rule == Rule::Underflow && f.measure == Measure::FlushedToZero)
        .expect("underflow flag at x");
    assert_eq!(
        flushed.value,
        2f64.powi(-26),
        "the flag carries the f64 value that was lost"
    );
    for dtype in [Dtype::Bf16, Dtype::F32] {
        assert_eq!(
            gradient(&diagnosis, &trace, dtype, "x"),
            2f64.powi(-26),
            "{dtype} keeps 2^-26"
        );
        let run = diagnosis.replay_in(dtype).unwrap();
        assert!(
            !run.findings
                .iter()
                .any(|f| f.measure == Measure::FlushedToZero),
            "{dtype} flushes nothing"
        );
    }
    // The groups are the layers: each deeper layer's adjoint norm is a quarter of the one above.
    let layers: Vec<_> = diagnosis
        .groups
        .iter()
        .filter(|group| group.group.starts_with("layer"))
        .collect();
    assert_eq!(
        layers.first().unwrap().group,
        "layer13",
        "the layer nearest the output comes first"
    );
    assert_eq!(layers.len(), 13);
    for ratio in layers[1..].iter().map(|group| group.ratio.unwrap()) {
        assert!((ratio - 0.25).abs() < 1e-12, "ratio {ratio}");
    }
}

// Flush-to-zero hardware drops subnormals, so in that mode even 2^-24 is lost
// (IEEE 754-2019 §7.5 defines underflow; flushing is the non-standard hardware mode).
#[test]
fn flushing_subnormals_loses_the_twelve_layer_gradient_too() {
    let trace = sigmoid_chain(12);
    let settings = Settings {
        subnormals: Subnormals::Flush,
        ..Settings::default()
    };
    let diagnosis = diagnose(&trace, &settings);
    assert_eq!(gradient(&diagnosis, &trace, Dtype::F16, "x"), 0.0);
    assert_eq!(
        gradient(&diagnosis, &trace, Dtype::F32, "x"),
        2f64.powi(-24)
    );
}

/// x_t = w · x_{t−1} for 50 steps from x_0 = 0.5.
fn recurrence(w: f64) -> Trace {
    let mut tape = Tape::new("one-unit recurrence", Dtype::F64);
    let weight = tape.param("w", w);
    let mut x = tape.input("x0", 0.5);
    for _ in 0..50 {
        x = tape.mul(weight, x);
    }
    build(tape, x)
}

// Pascanu, Mikolov & Bengio, "On the difficulty of training recurrent neural
// networks", ICML 2013, §2.3: for x_t = w·x_{t−1}, ∂x_T/∂w = T·x_0·w^(T−1)
// (closed form by the product rule). T = 50, x_0 = 0.5: about 1.896e5 at w = 1.2,
// beyond f16's 65504 (IEEE 754-2019 table 3.5) but finite in f32.
#[test]
fn recurrence_at_1_2_explodes_and_overflows_f16() {
    let trace = recurrence(1.2);
    let diagnosis = diagnose(&trace, &Settings::default());
    let exact = 50.0 * 0.5 * 1.2f64.powi(49);
    assert!((exact - 1.896e5).abs() < 1e2);
    let got = gradient(&diagnosis, &trace, Dtype::F64, "w");
    assert!((got - exact).abs() / exact < 1e-12, "{got} vs {exact}");
    let f32_gradient = gradient(&diagnosis, &trace, Dtype::F32, "w");
    assert!(
        (f32_gradient - exact).abs() / exact < 1e-5,
        "f32 {f32_gradient}"
    );
    assert_eq!(gradient(&diagnosis, &trace, Dtype::F16, "w"), f64::INFINITY);
    let w = trace.find("w").unwrap();
    let half = diagnosis.replay_in(Dtype::F16).unwrap();
    let overflow = half.first_overflow().expect("f16 overflows");
    assert_eq!(overflow.node, w);
    assert_eq!(
        half.origins[0].class,
        OriginClass::SumOverflow,
        "fifty finite contributions of 3792 sum past 65504 at w"
    );
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Exploding && f.node == w)
    );
    assert!(diagnosis.advice.iter().any(|a| a.text.contains("Clipping")));
}

// Same source: at w = 0.5, ∂x_50/∂w = 25 · 2^-49 ≈ 4.44e-14; each of its
// fifty terms is 2^-50, below f16's smallest subnormal 2^-24.
#[test]
fn recurrence_at_0_5_vanishes_and_underflows_f16() {
    let trace = recurrence(0.5);
    let diagnosis = diagnose(&trace, &Settings::default());
    let exact = 25.0 * 2f64.powi(-49);
    assert!((exact - 4.44e-14).abs() < 1e-16);
    assert!((gradient(&diagnosis, &trace, Dtype::F64, "w") - exact).abs() / exact < 1e-12);
    assert!((gradient(&diagnosis, &trace, Dtype::F32, "w") - exact).abs() / exact < 1e-5);
    assert_eq!(gradient(&diagnosis, &trace, Dtype::F16, "w"), 0.0);
    let w = trace.find("w").unwrap();
    assert!(
        diagnosis
            .replay_in(Dtype::F16)
            .unwrap()
            .at_node(w)
            .any(|f| f.rule == Rule::Underflow)
    );
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Vanishing && f.node == w && f.measure == Measure::Norm)
    );
    let path = diagnosis.path_to(w).expect("w has a dominant path");
    assert!(
        path.hops.iter().any(|hop| (hop.gain - 0.5).abs() < 1e-12),
        "each step of the recurrence has gain w = 0.5"
    );
}

// Micikevicius et al., "Mixed Precision Training", ICLR 2018, §3.2: values
// below 2^-24 become zero in f16; scale the loss so the largest adjoint stays
// below 65504. With max |g| = 1 the largest power of two is 2^15 = 32768.
#[test]
fn loss_scale_for_unit_maximum_is_two_to_the_fifteen() {
    let scale = loss_scale(&[1.0, -0.5, 1e-9, 0.0], Subnormals::Keep).unwrap();
    assert_eq!(scale.scale, 32768.0);
    assert_eq!(scale.exponent, 15);
    assert_eq!(scale.nonzero, 3);
    assert!(
        (scale.underflow_unscaled - 1.0 / 3.0).abs() < 1e-15,
        "1e-9 < 2^-24 rounds to zero unscaled"
    );
    assert_eq!(
        scale.underflow_scaled, 0.0,
        "1e-9 · 32768 ≈ 3.3e-5 is representable"
    );
    assert!(loss_scale(&[0.0, f64::NAN], Subnormals::Keep).is_none());
    // A maximum of exactly 65504/2^k needs the strict inequality: S·max must stay below 65504.
    assert_eq!(
        loss_scale(&[65504.0 / 8.0], Subnormals::Keep)
            .unwrap()
            .scale,
        4.0
    );
}

// Pascanu, Mikolov & Bengio, ICML 2013, Algorithm 1: if ‖g‖ ≥ threshold then
// g ← threshold · g / ‖g‖. For g = (3, 4), ‖g‖ = 5.
#[test]
fn clipping_preview_follows_algorithm_one() {
    let g = [3.0, 4.0];
    let preview = ClipPreview::new(&[&g], 2.0);
    assert_eq!(preview.norm, 5.0);
    assert!(preview.clips);
    assert_eq!(preview.apply(&g), vec![1.2, 1.6]);
    let preview = ClipPreview::new(&[&g], 5.0);
    assert_eq!(preview.factor, 1.0);
    assert_eq!(preview.apply(&g), vec![3.0, 4.0]);
    let preview = ClipPreview::new(&[&g], 6.0);
    assert!(!preview.clips);
}

fn origin_of(
    trace: &Trace,
    diagnosis: &Diagnosis,
    param: &str,
) -> (String, OriginClass, Vec<String>) {
    let param = trace.find(param).unwrap();
    let origin = diagnosis
        .origin_of(param)
        .expect("the parameter's gradient is non-finite");
    assert!(
        origin.reached.contains(&param),
        "the origin lists the parameters it reached"
    );
    let chain = diagnosis
        .chain_to(param)
        .iter()
        .map(|&node| trace.node(node).id.clone())
        .collect();
    (trace.node(origin.node).id.clone(), origin.class, chain)
}

// (a) log(0) = −inf (IEEE 754-2019 §9.2.1: log of ±0 is −inf, divideByZero).
#[test]
fn class_a_log_of_zero() {
    let mut tape = Tape::new("a", Dtype::F64);
    let w = tape.param("w", 2.0);
    let x = tape.input("x", 0.0);
    let product = tape.mul(w, x);
    let product = tape.rename(product, "product");
    let log = tape.log(product);
    let log = tape.rename(log, "log_p");
    let trace = build(tape, log);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("log_p", OriginClass::NonFiniteValue)
    );
    assert_eq!(chain, ["log_p", "product", "w"]);
    let sentence = diagnosis.explain(&trace, trace.find("w").unwrap()).unwrap();
    assert!(
        sentence.starts_with(
            "Non-finite because of 'log_p' 2 hops up the sweep (a): the forward value"
        ),
        "{sentence}"
    );
    assert!(
        diagnosis
            .first_origin()
            .unwrap()
            .explanation
            .contains("log of 0"),
        "{}",
        diagnosis.first_origin().unwrap().explanation
    );
    assert!(diagnosis.findings.iter().any(|f| f.rule == Rule::NonFinite
        && f.site == Site::Value
        && f.node == trace.find("log_p").unwrap()));
}

// (a) exp(800) overflows f64, whose largest finite value is about 1.798e308
// (IEEE 754-2019 table 3.5; e^800 ≈ 2.7e347).
#[test]
fn class_a_exp_overflow_and_sqrt_of_negative() {
    let mut tape = Tape::new("a-exp", Dtype::F64);
    let w = tape.param("w", 800.0);
    let e = tape.exp(w);
    let trace = build(tape, e);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, _) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("exp_1", OriginClass::NonFiniteValue)
    );
    assert!(
        diagnosis
            .first_origin()
            .unwrap()
            .explanation
            .contains("exp(800) overflowed")
    );

    // sqrt of a negative number is NaN (IEEE 754-2019 §9.2, invalid operation).
    let mut tape = Tape::new("a-sqrt", Dtype::F64);
    let w = tape.param("w", -4.0);
    let s = tape.sqrt(w);
    let trace = build(tape, s);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, _) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("sqrt_1", OriginClass::NonFiniteValue)
    );
    assert!(
        diagnosis
            .first_origin()
            .unwrap()
            .explanation
            .contains("sqrt of a negative number (-4)")
    );
}

// (b) d/dx √x = 1/(2√x) is infinite at x = 0 while √0 = 0 is finite
// (elementary calculus); the same holds for x^0.5 through pow.
#[test]
fn class_b_sqrt_and_fractional_pow_at_zero() {
    let mut tape = Tape::new("b", Dtype::F64);
    let w = tape.param("w", 0.0);
    let s = tape.sqrt(w);
    let trace = build(tape, s);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("sqrt_1", OriginClass::NonFinitePartial)
    );
    assert_eq!(chain, ["sqrt_1", "w"]);

    let mut tape = Tape::new("b-pow", Dtype::F64);
    let w = tape.param("w", 0.0);
    let p = tape
        .apply(
            Op::Pow,
            &[w],
            Attrs {
                exponent: Some(0.5),
                ..Attrs::default()
            },
        )
        .unwrap();
    let trace = build(tape, p);
    let diagnosis = diagnose(&trace, &Settings::default());
    assert_eq!(
        origin_of(&trace, &diagnosis, "w").1,
        OriginClass::NonFinitePartial
    );
}

// (c) 1e300 · 1e300 = 1e600 exceeds f64's largest finite value ≈ 1.798e308
// (IEEE 754-2019 table 3.5), although each factor and the forward values are finite.
#[test]
fn class_c_product_overflow() {
    let mut tape = Tape::new("c", Dtype::F64);
    let w = tape.param("w", 1e-300);
    let x = tape.input("x", 1e300);
    let c = tape.constant("c", 1e300);
    let y = tape.mul(w, x);
    let y = tape.rename(y, "y");
    let loss = tape.mul(c, y);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!((node.as_str(), class), ("y", OriginClass::ProductOverflow));
    assert_eq!(chain, ["y", "w"]);
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Overflow && f.node == trace.find("y").unwrap())
    );
}

// (d) 1e308 + 1e308 exceeds f64's largest finite value (IEEE 754-2019 table 3.5):
// two finite contributions meet at the branch point h.
#[test]
fn class_d_sum_overflow_at_a_branch() {
    let mut tape = Tape::new("d", Dtype::F64);
    let w = tape.param("w", 1e-300);
    let one = tape.input("one", 1.0);
    let c = tape.constant("c", 1e308);
    let h = tape.mul(w, one);
    let h = tape.rename(h, "h");
    let a = tape.mul(h, c);
    let b = tape.mul(h, c);
    let loss = tape.add(a, b);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!((node.as_str(), class), ("h", OriginClass::SumOverflow));
    assert_eq!(chain, ["h", "w"]);
}

// (e) 0 × inf is NaN (IEEE 754-2019 §7.2, invalid operation): a masked-out
// sqrt branch has adjoint 0 but sqrt's partial at 0 is inf.
#[test]
fn class_e_zero_times_infinity() {
    let mut tape = Tape::new("e", Dtype::F64);
    let w = tape.param("w", 0.0);
    let zero = tape.constant("mask", 0.0);
    let three = tape.constant("three", 3.0);
    let s = tape.sqrt(w);
    let s = tape.rename(s, "root");
    let masked = tape.mul(s, zero);
    let other = tape.mul(w, three);
    let loss = tape.add(masked, other);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("root", OriginClass::NanFromInfinity)
    );
    assert_eq!(chain, ["root", "w"]);
    assert!(trace.node(trace.find("w").unwrap()).value.is_finite());
}

// (e) inf − inf is NaN (IEEE 754-2019 §7.2): inside one contribution the terms
// 1e300·1e300 and 1e300·(−1e300) overflow to +inf and −inf and are summed.
#[test]
fn class_e_infinities_cancelling_in_a_broadcast_sum() {
    let mut tape = Tape::new("e-sum", Dtype::F64);
    let w = tape.param("w", 1e-300);
    let v = tape.input(
        "v",
        ebb::tensor::Value::from_parts(vec![2], vec![1e300, -1e300]),
    );
    let c = tape.constant(
        "c",
        ebb::tensor::Value::from_parts(vec![2], vec![1e300, 1e300]),
    );
    let y = tape.mul(w, v);
    let y = tape.rename(y, "y");
    let z = tape.mul(y, c);
    let loss = tape.apply(Op::Sum, &[z], Attrs::default()).unwrap();
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, _) = origin_of(&trace, &diagnosis, "w");
    assert_eq!((node.as_str(), class), ("y", OriginClass::NanFromInfinity));
}

// Gains of y = c·x are |c| on the edge to x (elementary calculus); the
// dominant path takes the larger factor (common practice for longest paths).
#[test]
fn dominant_path_takes_the_larger_gain_and_gain_rule_fires() {
    let mut tape = Tape::new("diamond", Dtype::F64);
    let w = tape.param("w", 1.0);
    let x = tape.neg(w);
    let x = tape.rename(x, "x");
    let three = tape.input("three", 3.0);
    let big = tape.input("big", 1000.0);
    let a = tape.mul(three, x);
    let a = tape.rename(a, "a");
    let b = tape.mul(big, x);
    let b = tape.rename(b, "b");
    let loss = tape.add(a, b);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let w = trace.find("w").unwrap();
    let path = diagnosis.path_to(w).unwrap();
    let ids: Vec<&str> = path
        .hops
        .iter()
        .map(|hop| trace.node(hop.to).id.as_str())
        .collect();
    assert_eq!(ids, ["b", "x", "w"]);
    assert_eq!(path.hops[1].gain, 1000.0);
    assert!((path.log10_gain - 3.0).abs() < 1e-12);
    let b = trace.find("b").unwrap();
    assert!(
        diagnosis
            .findings
            .iter()
            .any(|f| f.rule == Rule::Gain && f.node == b && f.threshold == 100.0)
    );
}

// bf16 has 8 significant bits (Intel, "BFLOAT16 – Hardware Numerics
// Definition", 2018): 1 + 2^-9 rounds back to 1, losing the contribution; f32 keeps it.
#[test]
fn small_contribution_is_lost_in_bf16_not_in_f32() {
    let mut tape = Tape::new("swamp", Dtype::F64);
    let x = tape.param("x", 1.0);
    let small = tape.input("small", 2f64.powi(-9));
    let one = tape.input("one", 1.0);
    let a = tape.mul(x, small);
    let b = tape.mul(x, one);
    let loss = tape.add(a, b);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let x = trace.find("x").unwrap();
    let lost = diagnosis
        .replay_in(Dtype::Bf16)
        .unwrap()
        .first_lost()
        .expect("bf16 loses it");
    assert_eq!(
        (
            lost.node,
            lost.contribution,
            lost.before,
            lost.after,
            lost.lost
        ),
        (x, 2f64.powi(-9), 1.0, 1.0, 1.0)
    );
    assert!(
        diagnosis
            .replay_in(Dtype::F32)
            .unwrap()
            .first_lost()
            .is_none()
    );
    assert!(diagnosis.advice.iter().any(|a| a.text.contains("swamped")));
}

#[test]
fn a_clean_trace_has_no_findings() {
    let trace = Trace::try_from(ebb::demos::teaching()).unwrap();
    let diagnosis = diagnose(&trace, &Settings::default());
    assert!(diagnosis.is_clean(), "{:?}", diagnosis.findings);
    assert!(diagnosis.origins.is_empty());
    assert_eq!(diagnosis.paths.len(), 2);
}

// Iterative algorithms only: a long chain must not exhaust the stack. The NaN
// comes from sqrt(−1), NaN by IEEE 754-2019 §7.2 (invalid operation), and its
// partial 1/(2·NaN) carries the NaN into every adjoint below.
#[test]
fn a_long_chain_is_diagnosed_without_recursion() {
    const LENGTH: usize = 100_000;
    let mut tape = Tape::new("long chain", Dtype::F64);
    let w = tape.param("w", 1.0);
    let mut x = tape.neg(w);
    for _ in 0..LENGTH {
        x = tape.neg(x);
    }
    let bad = tape.sqrt(x);
    let trace = build(tape, bad);
    let settings = Settings {
        replay: vec![Dtype::F32],
        ..Settings::default()
    };
    let diagnosis = diagnose(&trace, &settings);
    let w = trace.find("w").unwrap();
    let origin = diagnosis.origin_of(w).unwrap();
    assert_eq!(origin.class, OriginClass::NonFiniteValue);
    assert_eq!(trace.node(origin.node).op, Op::Sqrt);
    assert_eq!(
        diagnosis.chain_to(w).len(),
        LENGTH + 3,
        "sqrt, every neg, w"
    );
    assert!(
        diagnosis.path_to(w).is_none(),
        "no gain is known past a NaN adjoint"
    );
}

// inf − inf is NaN (IEEE 754-2019 §7.2): two products that overflow f64 with
// opposite signs, 1e300·1e300 and 1e300·(−1e300), meet at the branch point x.
#[test]
fn opposite_infinities_turn_into_nan_at_a_branch() {
    let mut tape = Tape::new("nan at a branch", Dtype::F64);
    let w = tape.param("w", 1e-300);
    let one = tape.input("one", 1.0);
    let big = tape.constant("big", 1e300);
    let minus_big = tape.constant("minus_big", -1e300);
    let x = tape.mul(w, one);
    let x = tape.rename(x, "x");
    let a = tape.mul(x, big);
    let b = tape.mul(x, minus_big);
    let a_scaled = tape.mul(a, big);
    let b_scaled = tape.mul(b, big);
    let loss = tape.add(a_scaled, b_scaled);
    let trace = build(tape, loss);
    let diagnosis = diagnose(&trace, &Settings::default());
    let (_, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        class,
        OriginClass::ProductOverflow,
        "the first infinity is a product that overflowed"
    );
    assert_eq!(chain.last().map(String::as_str), Some("w"));
    let x = trace.find("x").unwrap();
    let birth = diagnosis
        .nan_births()
        .iter()
        .find(|birth| birth.node == x)
        .expect("x turns NaN");
    assert_eq!(birth.how, ebb::diagnose::NanHow::InfMinusInfAtBranch);
    let sentence = diagnosis.explain(&trace, trace.find("w").unwrap()).unwrap();
    assert!(
        sentence.contains("turned into NaN at 'x' (inf − inf at a branch"),
        "{sentence}"
    );
}

// A NaN seed makes every adjoint it reaches NaN (IEEE 754-2019 §6.2: NaN propagates).
#[test]
fn a_non_finite_seed_is_its_own_origin() {
    let mut tape = Tape::new("seed", Dtype::F64);
    let w = tape.param("w", 1.0);
    let y = tape.neg(w);
    let mut file = tape.finish(y);
    file.seed = Some(ebb::trace::ValueRepr::Scalar(f64::NAN));
    let trace = Trace::try_from(file).unwrap();
    let diagnosis = diagnose(&trace, &Settings::default());
    let (node, class, chain) = origin_of(&trace, &diagnosis, "w");
    assert_eq!(
        (node.as_str(), class),
        ("neg_1", OriginClass::NonFiniteSeed)
    );
    assert_eq!(chain, ["neg_1", "w"]);
}

// Every demo trace shipped: whatever its diagnosis, each parameter whose
// gradient is non-finite has an origin that lists it and explains itself,
// and a flagged trace gets advice.
#[test]
fn every_demo_trace_explains_its_non_finite_gradients() {
    for (name, file) in ebb::demos::all() {
        let trace = Trace::try_from(file).unwrap();
        let diagnosis = diagnose(&trace, &Settings::default());
        let mut sweep = ebb::sweep::Sweep::new(&trace, ebb::sweep::LedgerMode::Off);
        sweep.run_to_end();
        for param in trace.params() {
            if sweep
                .adjoint(param)
                .is_some_and(|adjoint| !adjoint.is_finite())
            {
                let origin = diagnosis
                    .origin_of(param)
                    .unwrap_or_else(|| panic!("{name}: no origin for {}", trace.node(param).id));
                assert!(origin.reached.contains(&param), "{name}");
                assert!(!origin.explanation.is_empty(), "{name}");
                assert_eq!(diagnosis.chain_to(param).last(), Some(&param), "{name}");
            }
        }
        if diagnosis.first_origin().is_some() {
            assert!(
                !diagnosis.advice.is_empty(),
                "{name}: a non-finite gradient gets advice"
            );
        }
    }
}
