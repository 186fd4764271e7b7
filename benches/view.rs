//! The terminal view at 200×50: one key and one frame on generated chains of
//! 10⁴ and 10⁶ nodes and on a network of tensor layers, in both modes; the
//! same while a diagnosis of the network runs on another thread (the key
//! must not wait for it); and the verification from its pane (README,
//! "Performance").

use ebb::diagnose::Settings;
use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::tensor::Value;
use ebb::trace::{Trace, validate};
use ebb::tui::{App, Job, Key, Task, Theme, Traces};
use ratatui::Terminal;
use ratatui::backend::TestBackend;
use ratatui::crossterm::event::{KeyCode, KeyEvent, KeyModifiers};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, OnceLock};

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

/// The benchmarks' largest network: eight tanh layers of width 256 on a
/// batch of 64 in f32, a mean squared error on top (about 1.1 million
/// elements of values; its diagnosis takes seconds).
fn network() -> Trace {
    const WIDTH: usize = 256;
    const BATCH: usize = 64;
    let mut tape = Tape::new("eight tanh layers", Dtype::F32);
    let mut h = tape.input(
        "x",
        Value::from_parts(
            vec![BATCH, WIDTH],
            (0..BATCH * WIDTH)
                .map(|k| ((k % 17) as f64 - 8.0) / 8.0)
                .collect(),
        ),
    );
    for layer in 0..8 {
        let weights = tape.param(
            &format!("layer{layer}.w"),
            Value::from_parts(
                vec![WIDTH, WIDTH],
                (0..WIDTH * WIDTH)
                    .map(|k| ((k % 13) as f64 - 6.0) / 96.0)
                    .collect(),
            ),
        );
        let product = tape.matmul(h, weights);
        h = tape.tanh(product);
    }
    let target = tape.input(
        "target",
        Value::from_parts(vec![BATCH, WIDTH], vec![0.0; BATCH * WIDTH]),
    );
    let loss = tape.mse(h, target);
    validate(tape.finish(loss)).unwrap()
}

/// The traces, made once and shared by every benchmark.
fn traces(which: &str) -> &'static Arc<Traces> {
    static SMALL: OnceLock<Arc<Traces>> = OnceLock::new();
    static LARGE: OnceLock<Arc<Traces>> = OnceLock::new();
    static NETWORK: OnceLock<Arc<Traces>> = OnceLock::new();
    match which {
        "chain 10^4" => SMALL.get_or_init(|| Traces::new(chain(10_000))),
        "chain 10^6" => LARGE.get_or_init(|| Traces::new(chain(1_000_000))),
        _ => NETWORK.get_or_init(|| Traces::new(network())),
    }
}

const TRACES: [&str; 3] = ["chain 10^4", "chain 10^6", "network"];

fn key(c: char) -> Key {
    Key::from_event(&KeyEvent::new(KeyCode::Char(c), KeyModifiers::NONE))
}

/// An app over `which` at 200×50 with nothing queued (benchmarks start work themselves).
fn app(which: &str) -> App<'static> {
    let mut app = App::new(traces(which), "bench", vec![Theme::default_theme()]);
    app.update(ebb::tui::Action::Cancel);
    app.resize(ratatui::layout::Rect::new(0, 0, 200, 50));
    app
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
#[divan::bench(args = TRACES, sample_count = 200)]
fn key_and_frame(bencher: divan::Bencher, which: &str) {
    let mut app = app(which);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    // Start mid-sweep so every pane has something to show.
    for _ in 0..10 {
        app.key(key('s'));
    }
    alternate_step_and_back(bencher, &mut app, &mut terminal);
}

/// The same while the network is diagnosed over and over on another thread,
/// as the worker does: the key and its frame must not wait for it.
#[divan::bench(args = TRACES, sample_count = 200)]
fn key_and_frame_while_diagnosing(bencher: divan::Bencher, which: &str) {
    let mut app = app(which);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    for _ in 0..10 {
        app.key(key('s'));
    }
    let stop = Arc::new(AtomicBool::new(false));
    let worker = {
        let stop = stop.clone();
        let network = traces("network").clone();
        std::thread::spawn(move || {
            let mut rounds = 0;
            while !stop.load(Ordering::Relaxed) {
                let task = Task {
                    id: rounds,
                    job: Job::Diagnose(Dtype::F32),
                    traces: network.clone(),
                    settings: Settings::default(),
                    progress: Default::default(),
                };
                let _ = task.run();
                rounds += 1;
            }
            rounds
        })
    };
    // The first diagnosis is under way before any sample is taken.
    std::thread::sleep(std::time::Duration::from_millis(200));
    alternate_step_and_back(bencher, &mut app, &mut terminal);
    stop.store(true, Ordering::Relaxed);
    let rounds = worker.join().unwrap();
    assert!(rounds >= 1, "a diagnosis ran throughout");
}

/// One frame with the selection scrolled far down the sweep order (the
/// visible window is all that is built).
#[divan::bench(args = TRACES, sample_count = 200)]
fn frame_deep_in_the_order(bencher: divan::Bencher, which: &str) {
    let mut app = app(which);
    let trace = app.session().trace();
    let order = trace.sweep_order();
    app.apply(ebb::tui::Msg::Select(ebb::tui::NodeIx::new(
        order[order.len() - 2],
    )));
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    bencher.bench_local(|| {
        terminal
            .draw(|frame| frame.render_widget(&app, frame.area()))
            .unwrap();
    });
}

/// Forward mode: one key (alternately step and step back the tangent sweep) and one frame.
#[divan::bench(args = ["chain 10^4", "chain 10^6"], sample_count = 200)]
fn forward_key_and_frame(bencher: divan::Bencher, which: &str) {
    let mut app = app(which);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    app.key(key('m'));
    for _ in 0..100 {
        app.key(key('s'));
    }
    alternate_step_and_back(bencher, &mut app, &mut terminal);
}

/// Running every verification check (what `v` hands the worker), and one frame of its result.
#[divan::bench(args = ["chain 10^4", "chain 10^6"], sample_count = 5)]
fn verify_from_the_pane(bencher: divan::Bencher, which: &str) {
    let mut app = app(which);
    let mut terminal = Terminal::new(TestBackend::new(200, 50)).unwrap();
    bencher.bench_local(|| {
        app.key(key('v'));
        app.work();
        terminal
            .draw(|frame| frame.render_widget(&app, frame.area()))
            .unwrap();
    });
}
