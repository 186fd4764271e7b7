//! Root-cause chains and steps: every chain the diagnosis reports is a path
//! of graph edges from the origin to the parameter, the origin's step is its
//! own, and the report's flag list marks the origin rather than the first
//! symptom. Checked on every demo and on random traces with non-finite
//! values injected.

mod common;

use common::{Rng, checked};
use ebb::diagnose::{Diagnosis, OriginClass, Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::ops::{Attrs, Op};
use ebb::record::{Tape, Var};
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::Trace;

fn quick() -> Settings {
    Settings {
        replay: Vec::new(),
        ..Settings::default()
    }
}

/// Asserts that every chain of `diagnosis` is a path of edges of `trace`,
/// from its origin to the node it explains, with the origin at its own step.
#[track_caller]
fn assert_chains_are_paths(trace: &Trace, diagnosis: &Diagnosis, label: &str) {
    let mut sweep = Sweep::new(trace, LedgerMode::Off);
    sweep.run_to_end();
    for origin in &diagnosis.origins {
        assert_eq!(
            Some(origin.step),
            trace.sweep_rank(origin.node),
            "{label}: an origin's step is its own node's"
        );
    }
    for &node in trace.sweep_order() {
        let finite = sweep
            .adjoint(node)
            .is_none_or(|adjoint| adjoint.is_finite());
        let chain = diagnosis.chain_to(node);
        if finite {
            assert!(chain.is_empty(), "{label}: a finite adjoint has no chain");
            continue;
        }
        let origin = diagnosis
            .origin_of(node)
            .unwrap_or_else(|| panic!("{label}: '{}' has no origin", trace.node(node).id));
        let ids: Vec<&str> = chain.iter().map(|&n| trace.node(n).id.as_str()).collect();
        assert_eq!(chain.first(), Some(&origin.node), "{label}: {ids:?}");
        assert_eq!(chain.last(), Some(&node), "{label}: {ids:?}");
        let forward = diagnosis.forward_hops(node);
        assert!(forward < chain.len(), "{label}: {ids:?}");
        for (hop, pair) in chain.windows(2).enumerate() {
            let (a, b) = (pair[0], pair[1]);
            if hop < forward {
                assert_eq!(
                    origin.class,
                    OriginClass::NonFiniteValue,
                    "{label}: only a forward value travels forward"
                );
                assert!(
                    trace.node(b).inputs.contains(&a),
                    "{label}: forward hop {hop} of {ids:?} is no edge"
                );
                assert!(!trace.node(b).value.is_finite(), "{label}: {ids:?}");
            } else {
                assert!(
                    trace.node(a).inputs.contains(&b),
                    "{label}: adjoint hop {hop} of {ids:?} is no edge"
                );
            }
        }
    }
}

#[test]
fn every_demo_chain_is_a_path_of_edges() {
    for (name, file) in ebb::demos::all() {
        let trace = checked(file);
        let diagnosis = diagnose(&trace, &quick());
        assert_chains_are_paths(&trace, &diagnosis, name);
    }
}

// ln 0 = −inf (IEEE 754-2019 §9.2.1). In the humidity loss h·ln p, the −inf
// reaches the sweep twice: as h_ln_p's partial towards the humidity input,
// and as ln p's own partial 1/p = inf towards the sigmoid.
#[test]
fn nan_hunt_chains_follow_the_adjoint_and_the_origin_keeps_its_own_step() {
    let trace = checked(ebb::demos::nan_hunt());
    let diagnosis = diagnose(&trace, &quick());
    let origin = diagnosis.first_origin().unwrap();
    let id = |n: usize| trace.node(n).id.clone();
    assert_eq!(id(origin.node), "ln_p");
    assert_eq!(
        Some(origin.step),
        trace.sweep_rank(trace.find("ln_p").unwrap())
    );
    assert_eq!(origin.step + 1, 9, "ln_p is the ninth node swept");
    let chain: Vec<String> = diagnosis
        .chain_to(trace.find("out.w").unwrap())
        .into_iter()
        .map(id)
        .collect();
    assert_eq!(chain, ["ln_p", "predicted", "out.pre", "out.xw", "out.w"]);
    let humidity = trace.find("humidity").unwrap();
    let chain: Vec<String> = diagnosis.chain_to(humidity).into_iter().map(id).collect();
    assert_eq!(chain, ["ln_p", "h_ln_p", "humidity"]);
    assert_eq!(diagnosis.forward_hops(humidity), 1);
}

// x/0 is ±inf for x ≠ 0 (IEEE 754-2019 §7.3). q = w/(x − c) at x = c has a
// pole; its consumer m = q·v spoils v first, then q's own pull-back spoils w.
#[test]
fn a_division_pole_chain_does_not_pass_through_a_consumer_of_the_origin() {
    let mut tape = Tape::new("pole", Dtype::F64);
    let w = tape.param("w", 2.0);
    let x = tape.input("x", 3.0);
    let c = tape.constant("c", 3.0);
    let d = tape.sub(x, c);
    let d = tape.rename(d, "d");
    let q = tape.div(w, d);
    let q = tape.rename(q, "q");
    let v = tape.param("v", 0.5);
    let m = tape.mul(q, v);
    let m = tape.rename(m, "m");
    let trace = checked(tape.finish(m));
    let diagnosis = diagnose(&trace, &quick());
    assert_chains_are_paths(&trace, &diagnosis, "pole");
    let id = |n: usize| trace.node(n).id.clone();
    let chain = |name: &str| -> Vec<String> {
        diagnosis
            .chain_to(trace.find(name).unwrap())
            .into_iter()
            .map(id)
            .collect()
    };
    assert_eq!(chain("w"), ["q", "w"]);
    assert_eq!(chain("x"), ["q", "d", "x"]);
    assert_eq!(chain("v"), ["q", "m", "v"]);
    let origin = diagnosis.first_origin().unwrap();
    assert_eq!(id(origin.node), "q");
    assert_eq!(id(origin.first_adjoint), "v", "the first symptom is at v");
    assert_eq!(
        Some(origin.step),
        trace.sweep_rank(trace.find("q").unwrap())
    );
    assert!(origin.first_adjoint_step < origin.step);
}

#[test]
fn the_report_marks_the_origin_flag_not_the_first_symptom() {
    let trace = checked(ebb::demos::nan_hunt());
    let diagnosis = diagnose(&trace, &quick());
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    let at = diagnosis.origin_flag(sweep.flags()).unwrap();
    let flag = &sweep.flags()[at];
    assert_eq!(trace.node(flag.node).id, "ln_p");
    assert_eq!(flag.kind, ebb::sweep::FlagKind::NonFiniteValue);
    let report =
        ebb::report::Report::new("nan_hunt.ron", &sweep).with_diagnosis(&trace, &diagnosis);
    let text = report.to_text();
    let marked: Vec<&str> = text
        .lines()
        .filter(|line| line.starts_with("  * "))
        .collect();
    assert_eq!(marked.len(), 1, "{text}");
    assert!(marked[0].contains("'ln_p'"), "{text}");
    assert!(text.contains("(* the origin)"), "{text}");
    let json: serde_json::Value = serde_json::from_str(&report.to_json()).unwrap();
    let flags = json["flags"].as_array().unwrap();
    assert_eq!(flags[0]["first"], true, "`first` keeps its meaning");
    assert_eq!(flags[0]["origin"], false);
    assert_eq!(flags[at]["origin"], true);
    assert_eq!(json["diagnosis"]["first_origin"]["step"], 9);
    assert_eq!(
        json["diagnosis"]["first_origin"]["first_adjoint"],
        "humidity"
    );
    assert_eq!(json["diagnosis"]["first_origin"]["first_adjoint_step"], 6);
}

/// A random trace of scalar ops over a few leaves, some of them set to
/// values that make logs, square roots, divisions and exponentials
/// non-finite, so that non-finite values appear at random places.
fn random_trace(seed: u64) -> Trace {
    let mut rng = Rng::new(seed);
    let mut tape = Tape::new("random non-finite", Dtype::F64);
    let specials = [0.0, -1.0, 800.0, 1e200, f64::NAN, f64::INFINITY, 0.5, 2.0];
    let mut vars: Vec<Var> = Vec::new();
    for k in 0..4 {
        let value = if rng.below(2) == 0 {
            specials[rng.below(specials.len())]
        } else {
            rng.uniform(-2.0, 2.0)
        };
        vars.push(if k % 2 == 0 {
            tape.param(&format!("p{k}"), value)
        } else {
            tape.input(&format!("x{k}"), value)
        });
    }
    let unary = [
        Op::Log,
        Op::Sqrt,
        Op::Exp,
        Op::Tanh,
        Op::Sigmoid,
        Op::Neg,
        Op::Relu,
    ];
    let binary = [Op::Add, Op::Sub, Op::Mul, Op::Div];
    for _ in 0..12 {
        let a = vars[rng.below(vars.len())];
        let var = if rng.below(2) == 0 {
            let op = unary[rng.below(unary.len())];
            tape.apply(op, &[a], Attrs::default()).unwrap()
        } else {
            let b = vars[rng.below(vars.len())];
            let op = binary[rng.below(binary.len())];
            tape.apply(op, &[a, b], Attrs::default()).unwrap()
        };
        vars.push(var);
    }
    // Sum the last few so that most nodes reach the output.
    let mut output = vars[vars.len() - 1];
    for &var in &vars[vars.len() - 5..vars.len() - 1] {
        output = tape.add(output, var);
    }
    checked(tape.finish(output))
}

#[test]
fn on_random_traces_with_injected_non_finite_values_every_chain_is_a_path() {
    let mut with_origins = 0;
    for seed in 0..400 {
        let trace = random_trace(seed);
        let diagnosis = diagnose(&trace, &quick());
        if !diagnosis.origins.is_empty() {
            with_origins += 1;
        }
        assert_chains_are_paths(&trace, &diagnosis, &format!("seed {seed}"));
    }
    assert!(
        with_origins > 100,
        "the generator injects non-finite values often enough ({with_origins})"
    );
}
