//! Handling one key and drawing one 200×50 frame of the terminal view, on
//! generated chains of 10⁴ and 10⁶ nodes, in both modes, and running the
//! verification from its pane (README, "Performance").

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::trace::{Trace, validate};
use ebb::tui::{App, Key, Theme};
use ratatui::Terminal;
use ratatui::backend::TestBackend;
use ratatui::crossterm::event::{KeyCode, KeyEvent, KeyModifiers};
use std::sync::OnceLock;

fn main() {
    divan::main();
}

/// x' = tanh(x)·cos(x), three nodes per block, as in tests/sweep_million.rs.
fn chain(nodes: usize) -> Trace {
    let mut tape = Tape::new("tanh-cos chain", Dtype::F64);
    let mut x = tape.param("x0", 0.9);
    while tape.len() + 3 <= nodes {
        let squashed = tape.tanh(x);
        let damped = tape.cos(x);
        x = tape.mul(squashed, damped);
    }
    validate(tape.finish(x)).unwrap()
}

fn trace(nodes: usize) -> &'static Trace {
    static SMALL: OnceLock<Trace> = OnceLock::new();
    static LARGE: OnceLock<Trace> = OnceLock::new();
    let cell = if nodes <= 10_000 { &SMALL } else { &LARGE };
    cell.get_or_init(|| chain(nodes))
}

fn key(c: char) -> Key {
    Key::from_event(&KeyEvent::new(KeyCode::Char(c), KeyModifiers::NONE))
}

/// Times one key, alternately step and step back so the state stays put, and one frame.
fn alternate_step_and_back(
    bencher: divan::Bencher,
    app: &mut App,
    terminal: &mut Terminal<TestBackend>,
) {
    let mut forward = true;
    bencher.bench_local(|| {
        app.key(key(if forward { 's' } else { 'b' }));
        forward = !forward;
        app.resize(ratatui::layout::Rect::new(0, 0, 200, 50));
        terminal
            .draw(|frame| frame.render_widget(&*app, frame.area()))
            .unwrap();
    });
}

/// One key (alternately step and step back, so the state stays put) and one frame.
#[divan::bench(args = [10_000, 1_000_000], sample_count = 200)]
fn key_and_frame(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    let mut app = App::new(trace, "bench", vec![Theme::default_theme()]);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    // Start mid-sweep so every pane has something to show.
    for _ in 0..100 {
        app.key(key('s'));
    }
    alternate_step_and_back(bencher, &mut app, &mut terminal);
}

/// One frame with the selection scrolled far down the sweep order (the
/// visible window is all that is built).
#[divan::bench(args = [10_000, 1_000_000], sample_count = 200)]
fn frame_deep_in_the_order(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    let mut app = App::new(trace, "bench", vec![Theme::default_theme()]);
    app.select(trace.sweep_order()[trace.sweep_order().len() - 10]);
    app.resize(ratatui::layout::Rect::new(0, 0, 200, 50));
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    bencher.bench_local(|| {
        terminal
            .draw(|frame| frame.render_widget(&app, frame.area()))
            .unwrap();
    });
}

/// Forward mode: one key (alternately step and step back the tangent sweep) and one frame.
#[divan::bench(args = [10_000, 1_000_000], sample_count = 200)]
fn forward_key_and_frame(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    let mut app = App::new(trace, "bench", vec![Theme::default_theme()]);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    app.key(key('m'));
    for _ in 0..100 {
        app.key(key('s'));
    }
    alternate_step_and_back(bencher, &mut app, &mut terminal);
}

/// Running every verification check from the Verify pane (`v`), and one frame of its result.
#[divan::bench(args = [10_000, 1_000_000], sample_count = 5)]
fn verify_from_the_pane(bencher: divan::Bencher, nodes: usize) {
    let trace = trace(nodes);
    let mut app = App::new(trace, "bench", vec![Theme::default_theme()]);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    bencher.bench_local(|| {
        app.key(key('v'));
        app.run_pending();
        app.resize(ratatui::layout::Rect::new(0, 0, 200, 50));
        terminal
            .draw(|frame| frame.render_widget(&app, frame.area()))
            .unwrap();
    });
}
