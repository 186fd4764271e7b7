//! The diagnosis in the terminal view, rendered into a ratatui TestBackend on
//! the shipped demo traces: origins and findings in Flags, the origin's
//! sentence and chain in Node, dominant paths and group ratios in Paths, and
//! the precision toggle; with the expected numbers derived independently.

mod common;

use common::view::{jump, pane, selected};

use common::screen::{contains, draw, find, row_with, rows, screen};

use ebb::dtype::Dtype;
use ebb::sweep::{LedgerMode, Sweep};
use ebb::trace::{self, Trace};
use ebb::tui::{Action, App, Theme};
use ratatui::buffer::Buffer;
use std::path::Path;

fn demo(name: &str) -> Trace {
    trace::load(
        &Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("traces")
            .join(name),
    )
    .unwrap()
}

/// The view as `ebb open` makes it, with the work queued on open (the diagnosis) done.
fn open(trace: &Trace) -> App<'static> {
    common::view::open_with(trace, vec![Theme::default_theme()])
}

/// Does queued work, as the worker does while the view keeps answering keys.
fn settle(app: &mut App) {
    app.work();
}

/// The text inside the pane whose title holds `title`, one string per row.
fn pane_rows(buf: &Buffer, title: &str) -> Vec<String> {
    let (x, y) = find(buf, title);
    let all = rows(buf);
    // The border's corner is the last '┌' at or left of the title.
    let left = all[y as usize]
        .chars()
        .take(x as usize + 1)
        .collect::<Vec<_>>()
        .iter()
        .rposition(|&c| c == '┌')
        .unwrap();
    let right = all[y as usize]
        .chars()
        .skip(left + 1)
        .position(|c| c == '┐')
        .unwrap()
        + left
        + 1;
    all[y as usize + 1..]
        .iter()
        .map(|row| row.chars().collect::<Vec<_>>())
        .take_while(|row| row[left] == '│')
        .map(|row| row[left + 1..right].iter().collect())
        .collect()
}

#[test]
fn nan_hunt_names_the_origin_its_class_and_its_sentence() {
    let trace = demo("nan_hunt.ron");
    let mut app = open(&trace);
    let ln_p = trace.find("ln_p").unwrap();
    // ln_p takes the log of 'predicted'; one of its entries is an exact 0 and ln 0 = −inf
    // (IEEE 754-2019 §9.2.1: log(±0) is −∞), so the origin is a non-finite forward value, class (a).
    let argument = &trace.node(trace.node(ln_p).inputs[0]).value;
    assert!(
        argument.to_f64().contains(&0.0),
        "the demo's log argument holds a zero"
    );
    assert!(trace.node(ln_p).value.to_f64().contains(&f64::NEG_INFINITY));
    let buf = draw(&mut app, 200, 50);
    assert!(
        screen(&buf).contains("origin (a) non-finite forward value at 'ln_p'"),
        "{}",
        screen(&buf)
    );
    let origin_row = row_with(&buf, "◆ step");
    assert!(
        origin_row.contains("ln_p") && origin_row.contains("origin (a) non-finite"),
        "{origin_row}"
    );
    let (x, y) = find(&buf, "◆ step");
    assert_eq!(
        buf[(x, y)].fg,
        Theme::default_theme().flag_origin.fg.unwrap()
    );

    app.update(Action::JumpToOrigin);
    assert_eq!(selected(&app), ln_p);
    let buf = draw(&mut app, 200, 50);
    let node = pane_rows(&buf, "2 Node · ln_p").join(" ");
    let node = node.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        node.contains(
            "origin Origin (a): the forward value of 'ln_p' (log) is -inf: log of 0 is −inf."
        ),
        "{node}"
    );
    // Four parameters lie below the log in the sweep; the chain to each starts at ln_p.
    assert!(node.contains("hops to hidden.w: ln_p →"), "{node}");
    assert!(node.contains("… and 1 more parameter"), "{node}");

    // After the sweep, a parameter's NaN gradient is explained from its own side.
    app.update(Action::RunToEnd);
    jump(&mut app, trace.find("out.w").unwrap());
    let buf = draw(&mut app, 200, 50);
    let node = pane_rows(&buf, "2 Node · out.w").join(" ");
    let node = node.split_whitespace().collect::<Vec<_>>().join(" ");
    assert!(
        node.contains("Non-finite because of 'ln_p'") && node.contains("up the sweep (a)"),
        "{node}"
    );
    // The sweep's own flags for non-finite adjoints carry the class too.
    let flag = rows(&buf)
        .into_iter()
        .find(|row| row.contains("! step") && row.contains(" out.pre "))
        .unwrap();
    assert!(flag.contains("non-finite adjoint NaN (a)"), "{flag}");
}

#[test]
fn nan_hunt_fits_80_by_24() {
    let trace = demo("nan_hunt.ron");
    let mut app = open(&trace);
    let buf = draw(&mut app, 80, 24);
    assert!(
        row_with(&buf, "◆ step").contains("ln_p"),
        "{}",
        screen(&buf)
    );
    assert!(
        screen(&buf).contains("6 Flags · 0 raised · 1 origin"),
        "{}",
        screen(&buf)
    );
    app.update(Action::JumpToOrigin);
    let buf = draw(&mut app, 80, 24);
    assert!(
        screen(&buf).contains("origin   Origin (a): the forward value"),
        "{}",
        screen(&buf)
    );
}

#[test]
fn exploding_shows_the_dominant_path_hop_by_hop() {
    let trace = demo("exploding.ron");
    // Independent of the diagnosis: W·Wᵀ = 1.44·I (W is 1.2 times a rotation), so every
    // pull-back g ↦ g·Wᵀ scales ‖g‖ by exactly 1.2 (Golub & Van Loan, "Matrix Computations",
    // 4th ed., 2013, §2.3: the 2-norm is invariant under orthogonal transformations).
    let w = trace
        .node(trace.find("cell.w").unwrap())
        .value
        .to_f64()
        .to_vec();
    for i in 0..4 {
        for j in 0..4 {
            let dot: f64 = (0..4).map(|k| w[4 * i + k] * w[4 * j + k]).sum();
            assert!(
                (dot - if i == j { 1.44 } else { 0.0 }).abs() < 1e-6,
                "W Wᵀ[{i}][{j}] = {dot}"
            );
        }
    }
    let mut app = open(&trace);
    app.update(Action::Focus(pane("Paths")));
    app.update(Action::Zoom);
    let buf = draw(&mut app, 200, 50);
    // The advice names cell.w, the parameter with the largest exploding gradient.
    assert!(
        screen(&buf).contains("8 Paths · cell.w: gain 1e7.0 over 95 hops"),
        "{}",
        screen(&buf)
    );
    let hop = |at: usize| {
        rows(&buf)
            .into_iter()
            .find(|row| row.starts_with(&format!("│{at:>4} ")))
            .unwrap()
    };
    assert!(
        hop(1).contains("loss") && hop(1).contains("→ h50"),
        "{}",
        hop(1)
    );
    assert!(
        hop(3).contains("t50.hw") && hop(3).contains("→ h49") && hop(3).contains("×1.2 "),
        "{}",
        hop(3)
    );
    assert!(
        hop(2).contains("×1 "),
        "an add passes its adjoint on unchanged: {}",
        hop(2)
    );
    // Hop k's product is the product of the gains shown so far.
    let product = |row: &str| {
        row.split("∏ 1e")
            .nth(1)
            .unwrap()
            .split_whitespace()
            .next()
            .unwrap()
            .parse::<f64>()
            .unwrap()
    };
    let first = product(&hop(1));
    assert!(
        (product(&hop(3)) - (first + 1.2f64.log10())).abs() < 0.01,
        "{}",
        hop(3)
    );
    // ] selects the next parameter and shows its path.
    app.update(Action::NextParameter);
    assert_eq!(trace.node(selected(&app)).id, "cell.u");
    let buf = draw(&mut app, 200, 50);
    assert!(
        screen(&buf).contains("8 Paths · cell.u"),
        "{}",
        screen(&buf)
    );
}

#[test]
fn vanishing_shows_group_norms_and_the_ratio_between_neighbours() {
    let trace = demo("vanishing.ron");
    let mut app = open(&trace);
    // Group norms from a plain sweep: the L2 norm of all of a group's adjoints together (common practice).
    let mut sweep = Sweep::new(&trace, LedgerMode::Off);
    sweep.run_to_end();
    let norm = |group: &str| {
        let squares: f64 = trace
            .sweep_order()
            .iter()
            .filter(|&&node| trace.node(node).group == group)
            .flat_map(|&node| sweep.adjoint(node).unwrap().to_f64().to_vec())
            .map(|x| x * x)
            .sum();
        squares.sqrt()
    };
    let expected = norm("tower/layer01") / norm("tower/layer02");
    app.update(Action::Focus(pane("Paths")));
    app.update(Action::Zoom);
    app.update(Action::Bottom);
    let buf = draw(&mut app, 200, 50);
    let row = row_with(&buf, "tower/layer01 ");
    let shown: f64 = row
        .split("↓×")
        .nth(1)
        .unwrap_or_else(|| panic!("{row}"))
        .split_whitespace()
        .next()
        .unwrap()
        .parse()
        .unwrap();
    // The pane prints six decimals: half a unit in the last place apart at most.
    assert!(
        (shown - expected).abs() <= 5e-7 * (1.0 + 1e-9),
        "{row}: expected ×{expected}"
    );
    // Bars: one cell per two decades from 1e-8, so the loss group (norm near 1) fills about half.
    assert!(
        row_with(&buf, "d0 ").contains("████"),
        "{}",
        row_with(&buf, "d0 ")
    );
    let (x, y) = find(&buf, "↓×");
    assert_eq!(
        buf[(x, y)].fg,
        Theme::default_theme().flag_small.fg.unwrap()
    );
    // The vanishing gradient's finding is listed in Flags with its value against the threshold.
    app.update(Action::Zoom);
    let buf = draw(&mut app, 200, 50);
    let vanishing = row_with(&buf, "↓ step");
    assert!(
        vanishing.contains("vanishing") && vanishing.contains(" < "),
        "{vanishing}"
    );
}

#[test]
fn the_precision_toggle_shows_f16_zeros_that_f32_keeps() {
    let trace = demo("underflow_f16.ron");
    assert_eq!(trace.dtype(), Dtype::F16);
    let mut app = open(&trace);
    let param = trace.find("hidden.w").unwrap();
    app.update(Action::RunToEnd);
    jump(&mut app, param);
    app.update(Action::CyclePrecision);
    assert!(app.is_working(), "re-typing runs on the worker");
    assert!(
        draw(&mut app, 200, 50)
            .content()
            .iter()
            .any(|cell| cell.symbol() == "…")
    );
    settle(&mut app);
    assert_eq!(
        app.session().trace().dtype(),
        Dtype::Bf16,
        "the cycle after the recorded f16 is bf16"
    );
    app.update(Action::CyclePrecision);
    settle(&mut app);
    assert_eq!(app.session().trace().dtype(), Dtype::F32);
    assert_eq!(
        app.session().sweep().cursor(),
        app.session().sweep().len(),
        "the sweep is at the same step as before"
    );

    // Expected from plain sweeps of the recorded trace and of its f32 copy.
    let f32_trace = trace.retyped(Dtype::F32, trace.subnormals());
    let (mut half, mut single) = (
        Sweep::new(&trace, LedgerMode::Off),
        Sweep::new(&f32_trace, LedgerMode::Off),
    );
    half.run_to_end();
    single.run_to_end();
    let (h, s) = (
        half.adjoint(param).unwrap().to_f64().to_vec(),
        single.adjoint(param).unwrap().to_f64().to_vec(),
    );
    let zeros: Vec<usize> = (0..h.len())
        .filter(|&k| h[k] == 0.0 && s[k] != 0.0)
        .collect();
    assert!(!zeros.is_empty());
    // Each lost entry is far below f16's smallest normal number 2⁻¹⁴ (IEEE 754-2019 §3.6,
    // Table 3.5: binary16 has emin = −14), where f16 keeps ever fewer bits and its products flush.
    assert!(
        zeros.iter().all(|&k| s[k].abs() < 2f64.powi(-14) / 64.0),
        "{:?}",
        zeros.iter().map(|&k| s[k]).collect::<Vec<_>>()
    );

    let buf = draw(&mut app, 200, 50);
    assert!(
        screen(&buf).contains("f32 (recorded f16)"),
        "{}",
        screen(&buf)
    );
    let node = pane_rows(&buf, "2 Node · hidden.w").join("\n");
    assert!(
        node.contains(&format!(
            "{} of {} entries zero in f16, non-zero in f32",
            zeros.len(),
            h.len()
        )),
        "{node}"
    );
    // The element table puts the two side by side.
    app.update(Action::Focus(pane("Node")));
    app.update(Action::Zoom);
    for _ in 0..zeros[0] {
        app.update(Action::Down);
    }
    let buf = draw(&mut app, 200, 50);
    assert!(
        screen(&buf).contains("adjoint f32             f16"),
        "{}",
        screen(&buf)
    );
    // Elements go by their multi-index.
    let index = ebb::format::multi_index(zeros[0], trace.node(param).value.shape());
    let row = rows(&buf)
        .into_iter()
        .find(|row| {
            row.trim_start_matches('│')
                .trim_start()
                .starts_with(&format!("{index}  "))
        })
        .unwrap();
    let numbers: Vec<f64> = row
        .trim_matches('│')
        .split_whitespace()
        .filter_map(|word| word.parse().ok())
        .collect();
    // Value, the f32 adjoint, the f16 one. The f32 number is shown as the shortest
    // decimal that reads back to the same f32 (IEEE 754-2019 §5.12.2, round trip).
    assert_eq!(Dtype::F32.round(numbers[1]), s[zeros[0]], "{row}");
    assert_eq!(numbers[2], 0.0, "{row}");

    // Once round: back to the recorded dtype.
    app.update(Action::CyclePrecision);
    settle(&mut app);
    assert_eq!(app.session().trace().dtype(), Dtype::F64);
    app.update(Action::CyclePrecision);
    settle(&mut app);
    assert_eq!(app.session().trace().dtype(), Dtype::F16);
    assert!(app.session().compare().is_none());
    assert_eq!(app.message(), Some("back to the recorded dtype f16"));
}

#[test]
fn toggling_exploding_into_f16_reports_where_it_first_overflows() {
    let trace = demo("exploding.ron");
    // The recorded loss exceeds f16's largest finite value 65504 (IEEE 754-2019 §3.6, Table 3.5),
    // so the f16 sweep overflows at its very first step.
    let loss = trace.node(trace.output()).value.as_scalar().unwrap();
    assert!(loss > 65504.0, "{loss}");
    let mut app = open(&trace);
    app.update(Action::CyclePrecision);
    settle(&mut app);
    let buf = draw(&mut app, 200, 50);
    let status = rows(&buf).pop().unwrap();
    assert!(
        status.contains("f16, sums in f32 (recorded f32)")
            && status.contains("f16 (sums in f32) vs f64: first overflow 'loss' step 1"),
        "{status}"
    );
    app.update(Action::Step);
    let buf = draw(&mut app, 200, 50);
    assert!(
        row_with(&buf, "✗ step 1").contains("loss"),
        "the loss is infinite in f16"
    );
}

#[test]
fn the_keys_are_in_the_help() {
    let trace = demo("nan_hunt.ron");
    let mut app = open(&trace);
    app.update(Action::Help);
    let buf = draw(&mut app, 200, 50);
    // The rest of the help, a page at a time.
    let mut below = String::new();
    for _ in 0..6 {
        app.update(Action::PageDown);
        below += &screen(&draw(&mut app, 200, 50));
    }
    for (key, what) in [
        ("D", "diagnose"),
        ("p", "sweep in the next dtype"),
        ("o", "jump to the origin"),
        ("1-8", "focus a pane"),
    ] {
        let row = row_with(&buf, what);
        assert!(row.contains(&format!("  {key} ")), "{row}");
    }
    assert!(
        below.contains("8 Paths: the dominant path to a parameter"),
        "{below}"
    );
    assert!(
        below.contains("◆ origin of a non-finite adjoint"),
        "{below}"
    );
}

#[test]
fn open_with_settings_uses_their_thresholds() {
    // The teaching demo's output `profit = gross − costs` passes its adjoint 1
    // on as +1 and −1, a gain of √2 ≈ 1.414 (closed form); with the gain rule's
    // upper threshold at 1.2 that is a finding, with the default 100 it is not.
    let trace = demo("teaching.ron");
    let mut default = open(&trace);
    default.update(Action::Focus(pane("Flags")));
    let buf = draw(&mut default, 200, 50);
    assert!(
        row_with(&buf, "6 Flags").contains("0 findings"),
        "{}",
        screen(&buf)
    );

    let settings = ebb::diagnose::Settings {
        gain_above: 1.2,
        ..ebb::diagnose::Settings::default()
    };
    let traces = Box::leak(Box::new(ebb::tui::Traces::new(trace.clone())));
    let mut strict = App::new(traces, "test", vec![Theme::default_theme()]).with_settings(settings);
    settle(&mut strict);
    strict.update(Action::Focus(pane("Flags")));
    let buf = draw(&mut strict, 200, 50);
    assert!(
        !row_with(&buf, "6 Flags").contains("0 findings"),
        "{}",
        screen(&buf)
    );
    assert!(contains(&buf, "1.414214"), "{}", screen(&buf));
}

// σ(−827) rounds to exactly 0 in f32, so one of the six output units is
// saturated: the Flags pane lists the finding with its own symbol.
#[test]
fn flags_lists_forward_health_findings() {
    let trace = demo("nan_hunt.ron");
    let mut app = open(&trace);
    app.update(Action::Focus(pane("Flags")));
    app.update(Action::Zoom);
    let buf = draw(&mut app, 200, 50);
    let row = row_with(&buf, "⊓ step");
    assert!(
        row.contains("predicted") && row.contains("saturated"),
        "{row}"
    );
}
