//! Hunting in the view: `f` runs to the next flag or diagnosis finding,
//! whichever comes first; the watch prompt runs the sweep until a condition
//! of its small language holds; and every sentence names the keys of the
//! live key map, so a key file's keys are the ones the screen shows.

mod common;

use common::screen::{contains, draw, screen};
use common::view::{open, selected};

use ebb::diagnose::{Settings, diagnose};
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{self, Trace, validate};
use ebb::tui::{Action, App, KeyMap, Overlay};
use std::path::Path;

fn demo(name: &str) -> Trace {
    trace::load(
        &Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("traces")
            .join(name),
    )
    .unwrap()
}

fn watch(app: &mut App, text: &str) {
    app.update(Action::OpenWatch);
    // The prompt offers the last condition again; start afresh.
    while let Overlay::Prompt(prompt) = app.overlay() {
        if prompt.text.is_empty() {
            break;
        }
        app.update(Action::Erase);
    }
    for c in text.chars() {
        app.update(Action::Type(c));
    }
    app.update(Action::Submit);
}

#[test]
fn f_stops_at_the_first_finding_when_no_flag_comes_first() {
    // Every number in the vanishing demo is finite, so no flag is raised; the
    // diagnosis still finds vanishing gradients, each at a step of the sweep.
    let trace = demo("vanishing.ron");
    let diagnosis = diagnose(&trace, &Settings::default());
    let first = diagnosis
        .findings
        .iter()
        .map(|finding| (finding.step, finding.node))
        .min()
        .expect("findings");
    let mut app = open(&trace);
    app.update(Action::RunToFlag);
    assert!(app.session().sweep().flags().is_empty());
    assert_eq!(
        app.session().sweep().cursor(),
        first.0 + 1,
        "stops just after the step"
    );
    assert_eq!(selected(&app), first.1);
    let message = app.message().unwrap();
    assert!(
        message.starts_with(&format!("step {}: ", first.0 + 1)),
        "{message}"
    );
    // And again: the next finding, later in the sweep.
    app.update(Action::RunToFlag);
    assert!(app.session().sweep().cursor() > first.0 + 1);
}

#[test]
fn f_stops_at_a_flag_when_it_comes_first() {
    // ln 0 = −inf (IEEE 754-2019 §9.2.1): the loss is flagged at step 1, before any finding.
    let mut tape = Tape::new("log of zero", Dtype::F64);
    let p = tape.param("p", 0.0);
    let y = tape.log(p);
    let loss = tape.neg(y);
    let trace = validate(tape.finish(loss)).unwrap();
    let mut app = open(&trace);
    app.update(Action::RunToFlag);
    assert_eq!(app.session().sweep().cursor(), 1);
    assert!(app.message().unwrap().contains("non-finite value"));
}

#[test]
fn a_watch_for_a_node_stops_where_it_is_next() {
    let trace = validate(ebb::demos::teaching()).unwrap();
    let mut app = open(&trace);
    watch(&mut app, "at demand");
    let demand = trace.find("demand").unwrap();
    assert_eq!(app.session().sweep().current(), Some(demand));
    assert_eq!(
        app.session().sweep().cursor(),
        trace.sweep_rank(demand).unwrap()
    );
    assert!(
        app.message()
            .unwrap()
            .contains("'at demand' holds after step 7")
    );
}

#[test]
fn a_watch_for_a_small_norm_stops_at_the_first_one() {
    let trace = demo("vanishing.ron");
    let mut app = open(&trace);
    watch(&mut app, "norm < 1e-8");
    // Expected from a plain sweep: the first step whose node's final adjoint norm is below 1e-8.
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    let expected = trace
        .sweep_order()
        .iter()
        .position(|&node| sweep.adjoint(node).is_some_and(|a| a.l2_norm() < 1e-8))
        .expect("the demo vanishes below 1e-8");
    assert_eq!(app.session().sweep().cursor(), expected + 1);
    assert_eq!(selected(&app), trace.sweep_order()[expected]);
    // Watching again goes on from there; at the end it says it never held.
    watch(&mut app, "norm > 1e300");
    assert!(app.session().sweep().is_done());
    assert!(app.message().unwrap().contains("never held"));
}

#[test]
fn a_watch_for_a_non_finite_adjoint_and_a_bad_condition() {
    let mut tape = Tape::new("log of zero", Dtype::F64);
    let w = tape.param("w", 1.0);
    let p = tape.input("p", 0.0);
    let wp = tape.mul(w, p);
    let y = tape.log(wp);
    let loss = tape.neg(y);
    let trace = validate(tape.finish(loss)).unwrap();
    let mut app = open(&trace);
    // neg sends −1 to y; y = ln 0 has partial 1/0 = inf, so its step makes wp's adjoint infinite.
    watch(&mut app, "nonfinite");
    assert_eq!(app.session().sweep().cursor(), 2);
    // A condition that does not parse keeps the prompt open and says why, with the syntax.
    watch(&mut app, "norm = 3");
    let Overlay::Prompt(prompt) = app.overlay() else {
        panic!("the prompt stays open");
    };
    assert!(prompt.error.as_deref().unwrap().contains("comparison"));
    let buf = draw(&mut app, 120, 40);
    assert!(contains(&buf, "run until: norm = 3"), "{}", screen(&buf));
    assert!(
        contains(&buf, "a comparison (>, >=, <, <=)"),
        "{}",
        screen(&buf)
    );
}

#[test]
fn the_screen_names_the_keys_of_the_key_file() {
    let trace = validate(ebb::demos::teaching()).unwrap();
    let keys = KeyMap::parse(
        r#"[
            (action: "step", keys: ["Right"]),
            (action: "diagnose", keys: ["Z"]),
            (action: "walk_back", scope: "edges", keys: ["x"]),
        ]"#,
        Path::new("keys.ron"),
    )
    .unwrap();
    let traces = Box::leak(Box::new(ebb::tui::Traces::new(trace.clone())));
    let mut app =
        App::new(traces, "test", vec![ebb::tui::Theme::default_theme()]).with_keymap(keys);
    // Not diagnosed yet (its work not done): Paths says which key diagnoses.
    app.update(Action::Cancel);
    app.update(Action::Focus(common::view::pane("Paths")));
    let text = screen(&draw(&mut app, 200, 50));
    assert!(text.contains("no diagnosis yet: Z runs it"), "{text}");
    assert!(
        text.contains("→ step"),
        "the hints name the new step key:\n{text}"
    );
    app.update(Action::Focus(common::view::pane("Edges")));
    common::view::jump(&mut app, trace.find("demand").unwrap());
    common::view::jump(&mut app, trace.find("gross").unwrap());
    let text = screen(&draw(&mut app, 200, 50));
    assert!(text.contains("(x goes back)"), "{text}");
    assert!(text.contains("x walk back"), "{text}");
}
