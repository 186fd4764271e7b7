//! The Verify pane and forward mode rendered into a ratatui TestBackend: the
//! suspect a user must see for an injected wrong partial, the recorded and
//! recomputed partials side by side with the differing element marked, and
//! the teaching demo's dual numbers and directional derivative against the
//! closed form.

mod common;

use common::view::{pane, select, selected};

use common::screen::{contains, draw, find, numbers_in, row_with, rows};

use ebb::dtype::Dtype;
use ebb::ops::{Attrs, Op};
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{PartialRepr, Trace, validate};
use ebb::tui::{Action, App, Theme};
use ratatui::buffer::Buffer;

fn app(trace: &Trace) -> App<'static> {
    common::view::open_with(trace, vec![Theme::default_theme()])
}

/// The columns `from..from + width` of every row: one pane of the wide layout.
fn columns(buf: &Buffer, from: usize, width: usize) -> Vec<String> {
    rows(buf)
        .iter()
        .map(|row| row.chars().skip(from).take(width).collect())
        .collect()
}

/// x = [0.5, −1, 2], growth = exp(x), loss = Σ growth, with growth's recorded
/// partial given the wrong sign at element 1 only. By the closed form
/// d/dx eˣ = eˣ the right partial is eˣ elementwise.
fn wrong_exp_partial() -> Trace {
    let mut tape = Tape::new("wrong exp partial", Dtype::F64);
    let x = tape.param("x", Value::from_parts(vec![3], vec![0.5, -1.0, 2.0]));
    let growth = tape.exp(x);
    let growth = tape.rename(growth, "growth");
    let loss = tape.apply(Op::Sum, &[growth], Attrs::default()).unwrap();
    let loss = tape.rename(loss, "loss");
    let mut file = tape.finish(loss);
    let partial = vec![0.5f64.exp(), -(-1.0f64).exp(), 2.0f64.exp()];
    let at = file
        .nodes
        .iter()
        .position(|node| node.id == "growth".into())
        .unwrap();
    file.nodes[at].partials = vec![PartialRepr::Diagonal(partial)];
    validate(file).unwrap()
}

#[test]
fn the_verify_pane_names_the_node_with_the_wrong_partial_and_its_band() {
    let trace = wrong_exp_partial();
    let mut app = app(&trace);
    let buf = draw(&mut app, 200, 50);
    assert!(
        contains(&buf, "7 Verify") || contains(&buf, "5 Trend"),
        "the corner slot is titled"
    );
    // Showing the pane asks the worker for the checks, once.
    app.update(Action::Focus(pane("Verify")));
    assert!(app.is_working() && app.session().verified().is_none());
    app.work();
    assert!(app.session().verified().is_some());
    let buf = draw(&mut app, 200, 50);
    assert!(
        contains(&buf, "5 Trend │ 7 Verify"),
        "Verify takes Trend's slot in the wide layout"
    );
    // Trend and Verify share the right-hand column, from column 140 on.
    let pane = columns(&buf, 140, 60);
    let header = pane
        .iter()
        .position(|row| row.contains("suspect(s), worst first"))
        .expect("the suspect list");
    let first = &pane[header + 1];
    // A sign error scores relative error |a − b| / (|a| + |b|) = 1 exactly (common
    // practice for gradient checks), above 1e-2: "probably wrong".
    assert!(
        first.contains("growth") && first.contains("probably wrong") && first.contains("rel 1 "),
        "{first}"
    );
    assert!(
        first.contains("recorded partial") && first.contains('▲'),
        "{first}"
    );
    let theme = Theme::default_theme();
    let (x, y) = find(&buf, "›▲ growth");
    assert_eq!(
        buf[(x + 1, y)].fg,
        theme.flag_value.fg.unwrap(),
        "the band's colour backs its symbol"
    );
    // No other node is blamed for a wrong recorded partial.
    let partial_rows = pane
        .iter()
        .filter(|row| {
            row.contains(" rel ") && row.contains("recorded partial") && !row.contains("growth")
        })
        .count();
    assert_eq!(partial_rows, 0, "{}", pane.join("\n"));
}

#[test]
fn recorded_and_recomputed_partials_side_by_side_with_the_difference_marked() {
    let trace = wrong_exp_partial();
    let mut app = app(&trace);
    app.update(Action::Focus(pane("Verify")));
    app.work();
    let buf = draw(&mut app, 200, 50);
    assert!(contains(
        &buf,
        "growth ∂ in 0 ← x: recorded vs exp's rule · 1 of 3 differ"
    ));
    // d/dx eˣ = eˣ (closed form): element [1] was recorded as −e⁻¹ where the rule gives e⁻¹.
    let differs = row_with(&buf, "≠     [1]");
    let found = numbers_in(differs.split("[1]").nth(1).unwrap());
    assert_eq!(found[..2], [-(-1.0f64).exp(), (-1.0f64).exp()], "{differs}");
    for (element, expected) in [(0, 0.5f64.exp()), (2, 2.0f64.exp())] {
        let label = format!("=     [{element}]  ");
        let row = row_with(&buf, &label);
        let found = numbers_in(row.split(&label).nth(1).unwrap());
        assert_eq!(found[..2], [expected, expected], "{row}");
    }
    let theme = Theme::default_theme();
    let (x, y) = find(&buf, "≠     [1]");
    assert_eq!(
        buf[(x, y)].fg,
        theme.flag_value.fg.unwrap(),
        "the mark is a symbol and a colour"
    );
    let (x, y) = find(&buf, "=     [0]");
    assert_eq!(buf[(x, y)].fg, theme.done.fg.unwrap());
    // Enter selects the suspect's node in the other panes.
    app.update(Action::Enter);
    assert_eq!(trace.node(selected(&app)).id, "growth");
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "2 Node · growth"));
    assert!(contains(&buf, "growth: probably wrong (recorded partial)"));
    // The next suspect is not a recorded partial, so no table is shown for it.
    app.update(Action::Down);
    let buf = draw(&mut app, 200, 50);
    assert!(!contains(&buf, "recorded vs exp's rule"));
}

#[test]
fn the_verify_pane_says_plainly_when_everything_agrees() {
    let trace = validate(ebb::demos::teaching()).unwrap();
    let mut app = app(&trace);
    let buf = draw(&mut app, 80, 24);
    assert!(
        !contains(&buf, "Verify ·"),
        "not shown, and not run, until asked"
    );
    assert!(app.session().verified().is_none());
    app.update(Action::Verify);
    app.work();
    let buf = draw(&mut app, 80, 24);
    // At 80 columns Verify joins the shared slot; unfocused tabs go by number.
    assert!(
        contains(&buf, "3 │ 4 │ 5 │ 7 Verify │ 8 · all agree"),
        "{}",
        rows(&buf).join("\n")
    );
    assert!(contains(&buf, "= every check agrees within 1e-4"));
    assert!(contains(&buf, "verified in"));
}

// Teaching demo, closed form: profit = (p − c)·q − (k·q² + f·q), q = exp(−s·p), at
// p = 2.5, c = 1, s = 0.4, k = 0.1, f = 0.05, so q = e⁻¹. By the chain rule (by hand):
//   ∂profit/∂p = q + ((p − c) − 2kq − f)·(−s·q) = 0.42q + 0.08q²,
//   ∂profit/∂s = ((p − c) − 2kq − f)·(−p·q) = −2.5q·(1.45 − 0.2q).
// Along v = e_p the tangent of q is −s·q = −0.4q.
const Q: f64 = 0.36787944117144233; // e⁻¹ (from memory; checked against f64::exp below)

fn d_price() -> f64 {
    0.42 * Q + 0.08 * Q * Q
}

fn d_sensitivity() -> f64 {
    -2.5 * Q * (1.45 - 0.2 * Q)
}

#[track_caller]
fn near(shown: f64, expected: f64) {
    assert!(
        (shown - expected).abs() <= 4.0 * f64::EPSILON * expected.abs(),
        "shown {shown}, closed form {expected}"
    );
}

#[test]
fn forward_mode_shows_dual_numbers_in_recording_order() {
    assert_eq!(Q, (-1f64).exp());
    let trace = validate(ebb::demos::teaching()).unwrap();
    let mut app = app(&trace);
    select(&mut app, trace.find("price").unwrap());
    app.update(Action::ToggleForward);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "forward mode, v = unit along price"));
    assert!(contains(&buf, "FORWARD MODE │"));
    assert!(contains(&buf, "tangent step 0/15 │ next price (param)"));
    // Eight steps: price, unit_cost, sensitivity, storage_rate, fee_rate, s_times_p, minus_sp, demand.
    for _ in 0..8 {
        app.update(Action::Step);
    }
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "tangent step 8/15 │ next margin (sub)"));
    // Order lists the recording order: demand (row 8) done, margin (row 9) current.
    assert!(contains(&buf, "│✓  8 demand "), "{}", rows(&buf).join("\n"));
    assert!(contains(&buf, "│▶  9 margin "));
    let price_row = row_with(&buf, "│✓  1 price ");
    assert_eq!(
        numbers_in(&price_row.chars().take(63).collect::<String>())[1..],
        [2.5, 1.0],
        "price is (2.5, 1): the seed"
    );
    // The dual number of demand: (q, −s·q).
    select(&mut app, trace.find("demand").unwrap());
    let buf = draw(&mut app, 200, 50);
    let dual = numbers_in(
        row_with(&buf, "dual     (")
            .split("dual     ")
            .nth(1)
            .unwrap(),
    );
    near(dual[0], Q);
    near(dual[1], -0.4 * Q);
    assert!(contains(&buf, "✓ tangent known (forward step 8)"));
    // How it was formed: ∂exp/∂x = eˣ = q times minus_sp's tangent −s = −0.4 (closed form).
    let formed = row_with(&buf, "tangent  Σ ∂ × input tangent:");
    assert!(
        formed.contains(&format!("{Q} × -0.4 (minus_sp) = ")),
        "{formed}"
    );
    // Inflow and Edges speak of tangents.
    assert!(
        contains(&buf, "tangents flowing in"),
        "{}",
        rows(&buf).join("\n")
    );
    assert!(contains(
        &buf,
        "inputs → their tangents × ∂ flow into demand"
    ));
    // Status hints come from the key map and follow the mode.
    app.update(Action::Cancel);
    let buf = draw(&mut app, 200, 50);
    assert!(
        contains(&buf, "d direction m reverse mode"),
        "{}",
        row_with(&buf, "FORWARD")
    );
    assert!(!row_with(&buf, "FORWARD").contains("to flag"));
    // Stepping back forgets demand's tangent; the reverse sweep never moved.
    app.update(Action::Back);
    let buf = draw(&mut app, 200, 50);
    assert!(row_with(&buf, "dual     (").contains("(0.36787944117144233, —)"));
    assert_eq!(app.session().sweep().cursor(), 0);
}

#[test]
fn at_the_end_the_directional_derivative_matches_the_reverse_sweep() {
    let trace = validate(ebb::demos::teaching()).unwrap();
    let mut app = app(&trace);
    select(&mut app, trace.find("price").unwrap());
    app.update(Action::ToggleForward);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "∂f/∂v and ⟨v, ∇f⟩ appear once"));
    app.update(Action::RunToEnd);
    let buf = draw(&mut app, 200, 50);
    // Along v = e_p both numbers are ∂profit/∂p = 0.42q + 0.08q² (closed form above).
    let order = columns(&buf, 0, 64);
    let tangent = order
        .iter()
        .find(|row| row.contains("∂f/∂v   "))
        .expect("the foot");
    let reverse = order
        .iter()
        .find(|row| row.contains("⟨v, ∇f⟩ "))
        .expect("the foot");
    near(numbers_in(tangent)[0], d_price());
    near(numbers_in(reverse)[0], d_price());
    assert!(
        order
            .iter()
            .any(|row| row.contains("= agree (relative error"))
    );
    assert!(
        contains(&buf, "(tangent) · ⟨v, ∇f⟩ = "),
        "the status line says it too"
    );
    assert!(contains(&buf, "they agree"));
    // A seeded random direction over the parameters p and s: ⟨v, ∇f⟩ = v_p·∂f/∂p + v_s·∂f/∂s.
    app.update(Action::CycleDirection);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "v = random over 2 parameter(s), seed 0xebb"));
    let forward = app.session().forward().unwrap();
    let v = |id: &str| {
        forward
            .sweep
            .direction(trace.find(id).unwrap())
            .unwrap()
            .as_scalar()
            .unwrap()
    };
    let expected = v("price") * d_price() + v("sensitivity") * d_sensitivity();
    let order = columns(&buf, 0, 64);
    let tangent = order
        .iter()
        .find(|row| row.contains("∂f/∂v   "))
        .expect("the direction change keeps the position");
    assert!(
        (numbers_in(tangent)[0] - expected).abs() < 1e-15,
        "{tangent} vs {expected}"
    );
    // Help states the mode, with keys from the live key map.
    app.update(Action::Help);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(
        &buf,
        "Now: FORWARD MODE, v = random over 2 parameter(s)"
    ));
    app.update(Action::Cancel);
    app.update(Action::ToggleForward);
    app.update(Action::Help);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "Now: the reverse sweep. s/Space steps it"));
}

#[test]
fn forward_mode_fits_80_by_24() {
    let trace = validate(ebb::demos::teaching()).unwrap();
    let mut app = app(&trace);
    select(&mut app, trace.find("price").unwrap());
    app.update(Action::ToggleForward);
    app.update(Action::RunToEnd);
    let buf = draw(&mut app, 80, 24);
    // Order's foot and, with the output selected, the Node pane both show it.
    let tangent = row_with(&buf, "∂f/∂v   ");
    for pane in tangent.split('│').filter(|pane| pane.contains("∂f/∂v")) {
        near(numbers_in(pane)[0], d_price());
    }
    assert!(contains(&buf, "= agree"));
    assert!(contains(&buf, "FORWARD MODE │ f64 │ tangent step 15/15"));
}
