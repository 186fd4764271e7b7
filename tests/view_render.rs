//! The terminal view rendered into a ratatui TestBackend: what a user must
//! see in each pane (numbers at their dtype's precision, markers, flag
//! symbols, the derivative in words with this step's numbers), and
//! separately the colours that carry meaning.

mod common;

use common::screen::{contains, draw, find, numbers_in, row_with, rows, screen};
use common::view::{jump, pane, select, selected};

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{Trace, validate};
use ebb::tui::{Action, App, Theme};
use ratatui::buffer::Buffer;
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

fn app(trace: &Trace) -> App<'static> {
    common::view::open(trace)
}

fn node(trace: &Trace, id: &str) -> usize {
    trace.find(id).unwrap()
}

// Teaching demo, closed form: p = 2.5, c = 1, s = 0.4, k = 0.1, f = 0.05,
// q = exp(−s·p) = e⁻¹, profit = (p − c)·q − (k·q² + f·q). By the chain rule
// ∂profit/∂q = (p − c) − 2kq − f, reached in four contributions: −f through
// fee = f·q, −kq and −kq through q·q, then p − c through (p − c)·q.
const Q: f64 = 0.36787944117144233; // e⁻¹ (from memory; checked below against f64::exp)
const F: f64 = 0.05;

/// The first number after `label` in `line`.
#[track_caller]
fn number_after(line: &str, label: &str) -> f64 {
    let rest = line
        .split(label)
        .nth(1)
        .unwrap_or_else(|| panic!("{label:?} not in {line}"));
    numbers_in(rest)[0]
}

/// The text of the pane whose title holds `title`, its rows joined by newlines.
fn pane_text(buf: &Buffer, title: &str) -> String {
    let (x, y) = find(buf, title);
    let all = rows(buf);
    let chars: Vec<char> = all[y as usize].chars().collect();
    let left = chars[..=x as usize]
        .iter()
        .rposition(|&c| c == '┌')
        .unwrap();
    let right = chars[left + 1..].iter().position(|&c| c == '┐').unwrap() + left + 1;
    all[y as usize + 1..]
        .iter()
        .map(|row| row.chars().collect::<Vec<_>>())
        .take_while(|row| row[left] == '│')
        .map(|row| row[left + 1..right].iter().collect::<String>())
        .collect::<Vec<_>>()
        .join("\n")
}

#[test]
fn order_marks_done_current_and_pending_with_signed_adjoints() {
    assert_eq!(Q, (-1f64).exp());
    let trace = teaching();
    let mut app = app(&trace);
    for _ in 0..3 {
        app.update(Action::Step);
    }
    let buf = draw(&mut app, 200, 50);
    // Step 3 processed fee; its adjoint is −1 (costs = storage + fee passes −1 on
    // unchanged): the sign is shown, not only the magnitude.
    let fee = row_with(&buf, "│✓  3 fee ");
    let order_part: String = fee.chars().take(62).collect();
    assert_eq!(numbers_in(&order_part).last(), Some(&-1.0), "{fee}");
    assert!(contains(&buf, "│▶  4 storage "));
    assert!(contains(&buf, "│·  5 demand_sq "));
    assert!(contains(&buf, "step 3/15 │ next storage (mul)"));
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
    assert!(contains(&buf, "to come (4):"), "{}", screen(&buf));
    // Step 3 (fee = f·q) sends −f; step 5 (q·q) two of −kq; step 6 (gross) p − c.
    let expected = [
        None,
        None,
        Some(-F),
        Some(-F),
        Some(-F - 0.2 * Q),
        Some(1.5 - F - 0.2 * Q),
    ];
    for (step, after) in expected.iter().enumerate() {
        app.update(Action::Step);
        let buf = draw(&mut app, 200, 50);
        match after {
            Some(adjoint) => {
                let shown = number_after(&row_with(&buf, "adjoint  "), "adjoint  ");
                assert!(
                    (shown - adjoint).abs() < 1e-15,
                    "step {}: {shown} vs closed form {adjoint}",
                    step + 1
                );
            }
            None => assert!(
                row_with(&buf, "adjoint  ").contains("adjoint  none yet"),
                "step {}",
                step + 1
            ),
        }
    }
    let buf = draw(&mut app, 200, 50);
    let inflow = pane_text(&buf, "Inflow · demand");
    let received: Vec<Vec<f64>> = inflow
        .lines()
        .filter(|line| {
            line.contains(" fee ") || line.contains(" demand_sq ") || line.contains(" gross ")
        })
        .map(numbers_in)
        .collect();
    // step, slot, contribution, adjoint after
    assert_eq!(received.len(), 4, "{inflow}");
    let close = |row: &[f64], step: f64, slot: f64, contribution: f64, after: f64| {
        assert_eq!((row[0], row[1]), (step, slot), "{row:?}");
        assert!(
            (row[2] - contribution).abs() < 1e-15 && (row[3] - after).abs() < 1e-15,
            "{row:?}: want {contribution} then {after}"
        );
    };
    close(&received[0], 3.0, 1.0, -F, -F);
    close(&received[1], 5.0, 0.0, -0.1 * Q, -F - 0.1 * Q);
    close(&received[2], 5.0, 1.0, -0.1 * Q, -F - 0.2 * Q);
    close(&received[3], 6.0, 1.0, 1.5, 1.5 - F - 0.2 * Q);
    assert!(inflow.contains("complete: 4 contribution(s), the adjoint is final"));
    // Back over steps 6 (gross): its contribution is gone and gross is to come again.
    app.update(Action::Back);
    let buf = draw(&mut app, 200, 50);
    let inflow = pane_text(&buf, "Inflow · demand");
    assert!(
        !inflow
            .lines()
            .any(|line| line.contains(" gross ") && line.contains("1.5")),
        "{inflow}"
    );
    assert!(inflow.contains("to come (1):"), "{inflow}");
    let adjoint_line = row_with(&buf, "adjoint  ");
    assert!(
        (number_after(&adjoint_line, "adjoint  ") + F + 0.2 * Q).abs() < 1e-15,
        "{adjoint_line}"
    );
}

#[test]
fn node_teaches_the_rule_in_words_then_with_this_steps_numbers() {
    let trace = teaching();
    let mut app = app(&trace);
    // Up to gross: its step is next, its adjoint final (1).
    for _ in 0..5 {
        app.update(Action::Step);
    }
    select(&mut app, node(&trace, "gross"));
    let buf = draw(&mut app, 200, 50);
    let text = pane_text(&buf, "2 Node · gross");
    assert!(
        text.contains("rule     mul: each input receives adjoint × the other input"),
        "{text}"
    );
    assert!(
        text.contains("step 6 sends adjoint × ∂ along each edge"),
        "{text}"
    );
    app.update(Action::Step);
    let buf = draw(&mut app, 200, 50);
    let text = pane_text(&buf, "2 Node · gross");
    // ∂(a·b)/∂b = a: demand receives 1 × (p − c) = 1.5 (closed form).
    assert!(
        text.contains("∂ in 1   ← demand  1.5   1 × 1.5 = 1.5 to demand"),
        "{text}"
    );
    // Too long for one line beside the partial: on the line below.
    assert!(
        text.contains(&format!("∂ in 0   ← margin  {Q}\n"))
            || text.contains(&format!("∂ in 0   ← margin  {Q} ")),
        "{text}"
    );
    assert!(
        text.contains(&format!("  1 × {Q} = {Q} to margin")),
        "{text}"
    );
    // The add passes its adjoint on unchanged.
    select(&mut app, node(&trace, "costs"));
    let text = pane_text(&draw(&mut app, 200, 50), "2 Node · costs");
    assert!(
        text.contains("rule     add: each input receives the adjoint unchanged"),
        "{text}"
    );
    assert!(
        text.contains("∂ in 0   ← storage  1   -1 × 1 = -1 to storage"),
        "{text}"
    );
    // Values, state and site of a done node.
    app.update(Action::RunToEnd);
    select(&mut app, node(&trace, "demand"));
    app.update(Action::Focus(pane("Node")));
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "node     demand  exp  in demand"));
    assert!(contains(&buf, "state    ✓ done at step 8"));
    assert!(contains(&buf, "site     src/demos/"));
    assert!(contains(&buf, &format!("value    {Q}")));
    assert!(contains(
        &buf,
        "rule     exp: the input receives adjoint × eˣ"
    ));
    // d/dx eˣ = eˣ (closed form): the partial on the input edge is q itself.
    assert!(contains(&buf, &format!("∂ in 0   ← minus_sp  {Q}")));
    assert!(contains(&buf, "(final)"));
}

#[test]
fn edges_walk_along_an_edge_and_back_and_draw_the_graph() {
    let trace = teaching();
    let mut app = app(&trace);
    select(&mut app, node(&trace, "demand"));
    app.update(Action::Focus(pane("Edges")));
    let buf = draw(&mut app, 200, 50);
    assert!(contains(
        &buf,
        "inputs ← each receives demand's adjoint × ∂"
    ));
    // demand has three consumers: fee (∂ = f), demand_sq twice (∂ = q) and gross (∂ = p − c = 1.5).
    let edges = pane_text(&buf, "4 Edges · demand");
    assert!(
        edges.contains(" fee ") && edges.contains("slot 1 ∂ 0.05"),
        "{edges}"
    );
    assert!(
        edges.contains(" gross ") && edges.contains("slot 1 ∂ 1.5"),
        "{edges}"
    );
    assert_eq!(edges.matches(" demand_sq ").count(), 2, "{edges}");
    // The drawing: boxes with whole ids, the adjoint flowing down to demand.
    assert!(
        edges.contains("[·demand]") && edges.contains('▼'),
        "{edges}"
    );
    // The first consumer in recording order is gross.
    app.update(Action::Down);
    app.update(Action::Enter);
    assert_eq!(trace.node(selected(&app)).id, "gross");
    let buf = draw(&mut app, 200, 50);
    // The key named is the one this pane binds to walking back.
    assert!(contains(&buf, "walk: demand › gross  (h goes back)"));
    // The pane's own key walks back, and says so in the status line's hints.
    app.update(Action::WalkBack);
    assert_eq!(trace.node(selected(&app)).id, "demand");
    let status = rows(&draw(&mut app, 200, 50)).pop().unwrap();
    assert!(
        status.contains("Enter walk the edge") && status.contains("h walk back"),
        "{status}"
    );
}

#[test]
fn zoomed_edges_draw_the_whole_teaching_graph_with_each_id_once() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Focus(pane("Edges")));
    app.update(Action::Zoom);
    let buf = draw(&mut app, 200, 50);
    let text = screen(&buf);
    assert!(text.contains("the whole graph, 15 nodes"), "{text}");
    for recorded in trace.nodes() {
        // `[` and the sweep-state marker, then the id.
        let boxed = text.matches(&format!("{}]", recorded.id)).count();
        assert_eq!(boxed, 1, "{} drawn {boxed} times:\n{text}", recorded.id);
    }
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
        first.contains("✗ step 1 loss") && first.contains("non-finite value inf"),
        "{first}"
    );
    let log = trace
        .nodes()
        .iter()
        .find(|node| &*node.op_name == "log")
        .unwrap()
        .id
        .clone();
    app.update(Action::RunToFlag);
    assert_eq!(selected(&app), trace.find(&log).unwrap());
    let buf = draw(&mut app, 200, 50);
    let value_row = row_with(&buf, "✗ step 2");
    assert!(
        value_row.contains(&format!("✗ step 2 {log}"))
            && value_row.contains("non-finite value -inf"),
        "{value_row}"
    );
    // The partial of ln at 0 is 1/0 = +inf (IEEE 754-2019 §7.3: a non-zero divided by zero).
    let partial_row = row_with(&buf, "∂ step 2");
    assert!(
        partial_row.contains("non-finite partial inf"),
        "{partial_row}"
    );
    let theme = Theme::default_theme();
    let (x, y) = find(&buf, "✗ step 2");
    assert_eq!(buf[(x, y)].fg, theme.flag_value.fg.unwrap());
    let (x, y) = find(&buf, "∂ step 2");
    assert_eq!(buf[(x, y)].fg, theme.flag_partial.fg.unwrap());
    // Order marks the node with both symbols.
    let order_row = row_with(&buf, &format!("│✓ 2 {log} "));
    assert!(order_row.contains("✗∂"), "{order_row}");
    app.update(Action::Focus(pane("Flags")));
    app.update(Action::Top);
    app.update(Action::Enter);
    assert_eq!(selected(&app), trace.output());
}

#[test]
fn trend_puts_forward_value_norms_beside_adjoint_norms_per_group() {
    let trace = teaching();
    let mut app = app(&trace);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "no step done yet: s steps the sweep"));
    app.update(Action::RunToEnd);
    let buf = draw(&mut app, 200, 50);
    assert!(contains(&buf, "‖forward value‖"), "{}", screen(&buf));
    assert!(contains(&buf, "step 15"));
    // The inputs group holds price, unit_cost, sensitivity, storage_rate and fee_rate; each
    // column is the L2 norm of the five values or final adjoints taken together (common practice).
    let ids = [
        "price",
        "unit_cost",
        "sensitivity",
        "storage_rate",
        "fee_rate",
    ];
    let adjoints: f64 = ids
        .iter()
        .map(|id| {
            app.session()
                .sweep()
                .adjoint(node(&trace, id))
                .unwrap()
                .as_scalar()
                .unwrap()
                .powi(2)
        })
        .sum();
    let values: f64 = ids
        .iter()
        .map(|id| {
            trace
                .node(node(&trace, id))
                .value
                .as_scalar()
                .unwrap()
                .powi(2)
        })
        .sum();
    let trend = pane_text(&buf, "5 Trend");
    let inputs_row = trend
        .lines()
        .find(|row| row.starts_with("inputs "))
        .expect("an inputs group row");
    let shown = numbers_in(inputs_row);
    assert!((shown[0] - values.sqrt()).abs() < 1e-6, "{inputs_row}");
    assert!((shown[1] - adjoints.sqrt()).abs() < 1e-6, "{inputs_row}");
}

#[test]
fn numbers_print_at_their_dtype_precision_with_sign_and_multi_index() {
    // An f32 tensor whose elements are 0.72 and a vanishing 3.3e-10; the product with
    // a negative weight makes every adjoint negative.
    let mut tape = Tape::new("f32 numbers", Dtype::F32);
    let x = tape.param(
        "x",
        Value::from_parts(vec![2, 2], vec![0.72, 3.3e-10, 1.0, 2.0]),
    );
    let w = tape.param("w", -0.5);
    let y = tape.mul(x, w);
    let loss = tape.sum(y);
    let loss = tape.rename(loss, "loss");
    let trace = validate(tape.finish(loss)).unwrap();
    let mut app = app(&trace);
    app.update(Action::RunToEnd);
    select(&mut app, node(&trace, "x"));
    app.update(Action::Focus(pane("Node")));
    app.update(Action::Zoom);
    let text = screen(&draw(&mut app, 200, 50));
    // f32's 0.72 is 0.7200000286102295 in f64; the shortest decimal that reads back to
    // the same f32 is 0.72 (IEEE 754-2019 §5.12.2, round trip).
    assert!(!text.contains("0.7200000286102295"), "{text}");
    let row = |index: &str| {
        text.lines()
            .find(|line| line.trim_start_matches('│').trim_start().starts_with(index))
            .unwrap_or_else(|| panic!("no row {index}:\n{text}"))
            .to_string()
    };
    assert!(row("[0, 0]").contains(" 0.72 "), "{}", row("[0, 0]"));
    // Below 1e-4: scientific notation, not 0.00000000.
    assert!(row("[0, 1]").contains("3.3e-10"), "{}", row("[0, 1]"));
    // ∂(x·w)/∂x = w: every adjoint is −0.5.
    assert!(row("[1, 1]").contains("-0.5"), "{}", row("[1, 1]"));
    // Order gives w's adjoint its sign: Σ x · 1 with the sign of nothing else, 0.72 + 3.3e-10 + 3.
    app.update(Action::Zoom);
    let buf = draw(&mut app, 200, 50);
    let w_row = row_with(&buf, " w ");
    assert!(w_row.contains("3.72"), "{w_row}");
    let loss_row = row_with(&buf, " loss ");
    assert!(loss_row.contains(" 1 "), "{loss_row}");
}

#[test]
fn a_tiny_adjoint_has_a_bar_and_the_header_names_the_range() {
    // w · x with x = 3.3e-10: w's adjoint is 3.3e-10, far below 1e-8.
    let mut tape = Tape::new("tiny", Dtype::F64);
    let x = tape.input("x", 3.3e-10);
    let w = tape.param("w", 2.0);
    let y = tape.mul(w, x);
    let y = tape.rename(y, "y");
    let trace = validate(tape.finish(y)).unwrap();
    let mut app = app(&trace);
    app.update(Action::RunToEnd);
    let buf = draw(&mut app, 200, 50);
    let w_row = row_with(&buf, " w ");
    assert!(w_row.contains("3.3e-10"), "{w_row}");
    let bar: String = w_row
        .split("3.3e-10")
        .nth(1)
        .unwrap()
        .chars()
        .take(9)
        .collect();
    assert!(
        bar.contains(['█', '▏', '▎', '▍', '▌', '▋', '▊', '▉']),
        "{w_row}"
    );
    assert!(contains(&buf, "1e-10…1e1"), "{}", screen(&buf));
}

#[test]
fn help_lists_the_live_key_map() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Help);
    let buf = draw(&mut app, 200, 50);
    let (heading, rows) = &app.keymap().help()[0];
    assert!(contains(&buf, heading));
    for (keys, what) in rows.iter().take(30) {
        assert!(
            row_with(&buf, what).contains(keys.as_str()),
            "{keys} for {what}"
        );
    }
    app.update(Action::Cancel);
    let buf = draw(&mut app, 200, 50);
    assert!(!contains(&buf, "Keys (?"));
    // The status line's hints come from the same map: Order's own key first.
    assert!(
        contains(&buf, "Enter run the sweep to here s step b back"),
        "{}",
        screen(&buf)
    );
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
    assert!(
        contains(&buf, "3 Inflow │ 4 │ 5 │ 7 │ 8"),
        "{}",
        screen(&buf)
    );
}

#[test]
fn zoom_fills_the_screen_with_one_pane() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Focus(pane("Trend")));
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
    let mut app = common::view::open_with(&trace, plain);
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
    assert_eq!(trace.node(selected(&app)).id, "demand");
    app.update(Action::OpenJump);
    for c in "storage_".chars() {
        app.update(Action::Type(c));
    }
    let buf = draw(&mut app, 120, 40);
    assert!(contains(&buf, "jump to node: storage_"));
    app.update(Action::Complete);
    app.update(Action::Submit);
    assert_eq!(trace.node(selected(&app)).id, "storage_rate");
    app.update(Action::OpenJump);
    app.update(Action::Type('x'));
    app.update(Action::Submit);
    assert!(contains(
        &draw(&mut app, 200, 50),
        "no node has the id 'x' (Tab completes ids)"
    ));
}

#[test]
fn order_enter_runs_the_sweep_to_the_selected_node_and_back() {
    let trace = teaching();
    let mut app = app(&trace);
    app.update(Action::Bottom);
    app.update(Action::Enter);
    assert_eq!(app.session().sweep().cursor(), 14);
    assert_eq!(app.session().sweep().current(), trace.find("price"));
    app.update(Action::Top);
    app.update(Action::Enter);
    assert_eq!(app.session().sweep().cursor(), 0);
}

#[test]
fn jump_puts_the_old_selection_on_the_walk_history() {
    let trace = teaching();
    let mut app = app(&trace);
    jump(&mut app, node(&trace, "margin"));
    jump(&mut app, node(&trace, "price"));
    app.update(Action::WalkBack);
    assert_eq!(trace.node(selected(&app)).id, "margin");
    app.update(Action::WalkBack);
    assert_eq!(selected(&app), trace.output());
    app.update(Action::WalkBack);
    assert!(
        app.message().unwrap().contains("walk history is empty"),
        "{:?}",
        app.message()
    );
}
