//! The terminal view rendered into a ratatui TestBackend: what a user must
//! see in each pane (numbers, markers, flag symbols), and separately the
//! colours that carry meaning.

mod common;

use common::screen::{contains, draw, find, numbers_in, row_with, rows};

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::trace::{Trace, validate};
use ebb::tui::{Action, App, PaneId, Theme};
use ratatui::style::Color;

fn teaching() -> Trace {
    validate(ebb::demos::teaching()).unwrap()
}

/// A trace whose loss takes the log of an exact zero: ln 0 = −inf (IEEE 754-2019 §9.2.1: log(±0) is −∞).
fn log_of_zero() -> Trace {
    let mut tape = Tape::new("log of zero", Dtype::F64);
    let probability = tape.input("probability", 0.0);
    let weight = tape.param("weight", 2.0);
    let scaled = tape.mul(weight, probability);
    let log = tape.log(scaled);
    let loss = tape.neg(log);
    let loss = tape.rename(loss, "loss");
    validate(tape.finish(loss)).unwrap()
}

fn app(trace: &Trace) -> App<'_> {
    App::new(
        trace,
        "test",
        vec![Theme::default_theme(), Theme::shipped("light").unwrap()],
    )
}

// Teaching demo, closed form: p = 2.5, c = 1, s = 0.4, k = 0.1, q = exp(−s·p) = e⁻¹,
// profit = (p − c)·q − k·q². By the chain rule ∂profit/∂q = (p − c) − 2kq, reached in
// three contributions: −kq and −kq through q·q, then p − c through (p − c)·q.
const Q: f64 = 0.36787944117144233; // e⁻¹ (from memory; checked below against f64::exp)

/// The first number after `label` in `line`.
#[track_caller]
fn number_after(line: &str, label: &str) -> f64 {
    let rest = line
        .split(label)
        .nth(1)
        .unwrap_or_else(|| panic!("{label:?} not in {line}"));
    numbers_in(rest)[0]
}

#[test]
fn order_marks_done_current_and_pending_with_their_norms() {
    assert_eq!(Q, (-1f64).exp());
    let trace = teaching();
    let mut app = app(&trace);
    for _ in 0..3 {
        app.update(Action::Step);
    }
    let buf = draw(&mut app, 200, 50);
    let storage = row_with(&buf, "demand_sq ");
    assert!(storage.contains("│✓  3 demand_sq"), "{storage}");
    // ∂profit/∂(q·q) = −k: its norm is 0.1.
    let order_part: String = storage.chars().take(62).collect();
    assert_eq!(numbers_in(&order_part).last(), Some(&0.1), "{storage}");
    assert!(contains(&buf, "│▶  4 gross "));
    assert!(contains(&buf, "│·  5 margin "));
    assert!(contains(&buf, "step 3/12 │ next gross (mul)"));
    let theme = Theme::default_theme();
    let (x, y) = find(&buf, "✓  3");
    assert_eq!(buf[(x, y)].fg, theme.done.fg.unwrap());
    let (x, y) = find(&buf, "▶  4");
    assert_eq!(buf[(x, y)].fg, theme.current.fg.unwrap());
    let (x, y) = find(&buf, "·  5");
    assert_eq!(buf[(x, y)].fg, theme.pending.fg.unwrap());
}

#[test]
fn inflow_shows_a_branch_point_filling_up_and_emptying_on_back() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::OpenJump);
    for c in "demand".chars() {
        app.update(Action::Type(c));
    }
    app.update(Action::Submit);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "Inflow · demand"));
    assert!(contains(&buf, "nothing received yet"));
    assert!(contains(&buf, "to come (3):"));
    // Step 3 (demand_sq = q·q) sends both of its contributions; step 4 (gross) the last.
    let expected = [
        None,
        None,
        None,
        Some(-0.2 * Q),
        Some(1.5 - 0.2 * Q),
        Some(1.5 - 0.2 * Q),
    ];
    for (step, after) in expected.iter().enumerate().skip(1) {
        app.update(Action::Step);
        let buf = draw(&mut app, 200, 50);
        match after {
            Some(adjoint) => {
                let shown = number_after(&row_with(&buf, "adjoint  "), "adjoint  ");
                assert!(
                    (shown - adjoint).abs() < 1e-15,
                    "step {step}: {shown} vs closed form {adjoint}"
                );
            }
            None => assert!(
                row_with(&buf, "adjoint  ").contains("adjoint  none yet"),
                "step {step}"
            ),
        }
    }
    let buf = draw(&mut app, 200, 50);
    let first = row_with(&buf, "   3 demand_sq        0 ");
    let second = row_with(&buf, "   3 demand_sq        1 ");
    let third = row_with(&buf, "   4 gross            1 ");
    let close = |line: &str, contribution: f64, after: f64| {
        // Inflow is the middle column, columns 64 to 139.
        let middle: String = line.chars().skip(64).take(76).collect();
        let found = numbers_in(&middle);
        let (c, a) = (found[found.len() - 2], found[found.len() - 1]);
        assert!(
            (c - contribution).abs() < 1e-15 && (a - after).abs() < 1e-15,
            "{line}: want {contribution} then {after}"
        );
    };
    close(&first, -0.1 * Q, -0.1 * Q);
    close(&second, -0.1 * Q, -0.2 * Q);
    close(&third, 1.5, 1.5 - 0.2 * Q);
    assert!(contains(
        &buf,
        "complete: 3 contribution(s), the adjoint is final"
    ));
    // Back over steps 5 (margin) and 4 (gross): gross's contribution is gone and the adjoint is −2kq again.
    app.update(Action::Back);
    app.update(Action::Back);
    let buf = draw(&mut app, 200, 50);
    assert!(!contains(&buf, "   4 gross            1 1.5"));
    assert!(contains(&buf, "to come (1):"));
    assert!(contains(&buf, "to come (1):"));
    let adjoint_line = row_with(&buf, "adjoint  ");
    assert!(
        (number_after(&adjoint_line, "adjoint  ") + 0.2 * Q).abs() < 1e-15,
        "{adjoint_line}"
    );
}

#[test]
fn node_shows_value_partials_and_state() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::RunToEnd);
    app.select(trace.find("demand").unwrap());
    app.update(Action::Focus(PaneId::Node));
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "node     demand  exp  in demand"));
    assert!(contains(&buf, "state    ✓ done at step 6"));
    assert!(contains(&buf, "site     src/demos/"));
    assert!(contains(&buf, "value    0.36787944117144233"));
    // d/dx eˣ = eˣ (closed form): the partial on the input edge is q itself.
    assert!(contains(&buf, "∂ in 0   ← minus_sp  0.36787944117144233"));
    assert!(contains(&buf, "(final)"));
}

#[test]
fn edges_walk_along_an_edge_and_back() {
    let trace = teaching();
    let mut app = app(&trace);
    app.select(trace.find("demand").unwrap());
    app.update(Action::Focus(PaneId::Edges));
    let buf = draw(&mut app, 200, 50);
    assert!(contains(
        &buf,
        "inputs ← each receives demand's adjoint × ∂"
    ));
    // ∂(a·b)/∂b = a: the gross edge carries p − c = 1.5 (closed form).
    assert!(row_with(&buf, " gross ").contains("slot 1 ∂ 1.5"));
    app.update(Action::Down);
    app.update(Action::Enter);
    assert_eq!(trace.node(app.selected).id, "gross");
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "walk: demand › gross"));
    app.update(Action::WalkBack);
    assert_eq!(trace.node(app.selected).id, "demand");
    // A teaching-sized trace also gets the layered drawing with every node labelled.
    assert!(contains(&buf, "·price"));
}

#[test]
fn flags_show_symbol_node_and_kind_and_jump_to_it() {
    let trace = log_of_zero();
    let mut app = app(&trace);
    app.update(Action::RunToFlag);
    let buf = draw(&mut app, 200, 50);
    // The loss −ln 0 = +inf is itself flagged when the sweep processes it, at step 1.
    let first = row_with(&buf, "✗ step 1");
    assert!(
        first.contains("✗ step 1     loss") && first.contains("non-finite value inf"),
        "{first}"
    );
    let log = trace
        .nodes()
        .iter()
        .find(|node| node.op_name == "log")
        .unwrap()
        .id
        .clone();
    app.update(Action::RunToFlag);
    assert_eq!(app.selected, trace.find(&log).unwrap());
    let buf = draw(&mut app, 200, 50);
    let value_row = row_with(&buf, "✗ step 2");
    assert!(
        value_row.contains(&format!("✗ step 2     {log}"))
            && value_row.contains("non-finite value -inf"),
        "{value_row}"
    );
    // The partial of ln at 0 is 1/0 = +inf (IEEE 754-2019 §7.3: a non-zero divided by zero).
    let partial_row = row_with(&buf, "∂ step 2");
    assert!(
        partial_row.contains("non-finite partial inf"),
        "{partial_row}"
    );
    assert!(contains(&buf, &format!(" {log} ")));
    let theme = Theme::default_theme();
    let (x, y) = find(&buf, "✗ step 2");
    assert_eq!(buf[(x, y)].fg, theme.flag_value.fg.unwrap());
    let (x, y) = find(&buf, "∂ step 2");
    assert_eq!(buf[(x, y)].fg, theme.flag_partial.fg.unwrap());
    // Order marks the node with both symbols.
    let order_row = row_with(&buf, &format!("│✓ 2 {log} "));
    assert!(order_row.contains("✗∂"), "{order_row}");
    app.update(Action::Focus(PaneId::Flags));
    app.update(Action::Top);
    app.update(Action::Enter);
    assert_eq!(app.selected, trace.output());
}

#[test]
fn trend_charts_groups_after_the_sweep() {
    let trace = teaching();
    let mut app = app(&trace);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "no step done yet"));
    app.update(Action::RunToEnd);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "per group, ‖adjoint‖"));
    assert!(contains(&buf, "step 12"));
    // The inputs group holds price, unit_cost, sensitivity and storage_rate; its norm
    // is the norm of their four final adjoints (common practice: L2 norm).
    let squares: f64 = ["price", "unit_cost", "sensitivity", "storage_rate"]
        .iter()
        .map(|id| {
            app.sweep
                .adjoint(trace.find(id).unwrap())
                .unwrap()
                .as_scalar()
                .unwrap()
                .powi(2)
        })
        .sum();
    // The Trend pane is the right-hand column, from column 140 on.
    let right: Vec<String> = rows(&buf)
        .iter()
        .map(|row| row.chars().skip(141).collect())
        .collect();
    let inputs_row = right
        .iter()
        .find(|row| row.starts_with("inputs ") && row.contains('█'))
        .expect("an inputs group row");
    let shown = numbers_in(inputs_row)[0];
    assert!((shown - squares.sqrt()).abs() < 1e-6, "{inputs_row}");
}

#[test]
fn help_lists_the_live_key_map() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Help);
    let buf = draw(&mut app, 200, 50);
    let (heading, rows) = &app.keymap.help()[0];
    assert!(contains(&buf, heading));
    for (keys, what) in rows.iter().take(30) {
        assert!(
            row_with(&buf, what).contains(keys.as_str()),
            "{keys} for {what}"
        );
    }
    app.update(Action::Cancel);
    let buf = draw(&mut app, 80, 24);
    assert!(!contains(&buf, "Keys (?"));
    // The status line's hints come from the same map.
    assert!(contains(&buf, "s step b back f to flag"));
}

#[test]
fn a_small_terminal_gets_a_message_not_a_broken_layout() {
    let trace = teaching();
    let mut app = app(&trace);
    let buf = draw(&mut app, 79, 24);
    assert!(contains(&buf, "at least 80×24; this one is 79×24"));
    assert!(!contains(&buf, "Order"));
    let buf = draw(&mut app, 80, 24);
    assert!(contains(&buf, "1 Order"));
    // The shared slot names its panes as tabs; those not shown go by number where names do not fit.
    assert!(contains(&buf, "3 Inflow │ 4 │ 5 │ 7 "));
}

#[test]
fn zoom_fills_the_screen_with_one_pane() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Focus(PaneId::Trend));
    app.update(Action::Zoom);
    let buf = draw(&mut app, 100, 30);
    assert!(contains(&buf, "5 Trend"));
    assert!(!contains(&buf, "1 Order"));
    app.update(Action::Cancel);
    assert!(contains(&draw(&mut app, 100, 30), "1 Order"));
}

#[test]
fn cycling_themes_changes_the_colours_and_no_color_drops_them() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Step);
    let buf = draw(&mut app, 120, 40);
    let (x, y) = find(&buf, "✓  1");
    assert_eq!(buf[(x, y)].fg, Theme::default_theme().done.fg.unwrap());
    app.update(Action::CycleTheme);
    let buf = draw(&mut app, 120, 40);
    assert!(contains(&buf, "theme: light"));
    assert_eq!(
        buf[(x, y)].fg,
        Theme::shipped("light").unwrap().done.fg.unwrap()
    );
    let plain = Theme::cycle(None, true);
    let mut app = App::new(&trace, "test", plain);
    app.update(Action::Step);
    let buf = draw(&mut app, 120, 40);
    let (x, y) = find(&buf, "✓  1");
    assert_eq!(buf[(x, y)].fg, Color::Reset);
    assert!(
        buf.content()
            .iter()
            .all(|cell| cell.fg == Color::Reset && cell.bg == Color::Reset)
    );
}

#[test]
fn search_finds_by_op_and_jump_completes() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::OpenSearch);
    for c in "exp".chars() {
        app.update(Action::Type(c));
    }
    app.update(Action::Submit);
    assert_eq!(trace.node(app.selected).id, "demand");
    app.update(Action::OpenJump);
    for c in "storage_".chars() {
        app.update(Action::Type(c));
    }
    let buf = draw(&mut app, 120, 40);
    assert!(contains(&buf, "jump to node: storage_"));
    app.update(Action::Complete);
    app.update(Action::Submit);
    assert_eq!(trace.node(app.selected).id, "storage_rate");
    app.update(Action::OpenJump);
    app.update(Action::Type('x'));
    app.update(Action::Submit);
    assert!(contains(&draw(&mut app, 120, 40), "no node has the id 'x'"));
}

#[test]
fn order_enter_runs_the_sweep_to_the_selected_node_and_back() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Bottom);
    app.update(Action::Enter);
    assert_eq!(app.sweep.cursor(), 11);
    assert_eq!(app.sweep.current(), trace.find("price"));
    app.update(Action::Top);
    app.update(Action::Enter);
    assert_eq!(app.sweep.cursor(), 0);
}
