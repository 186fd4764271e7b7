//! The README's "Recording a trace" example, run as a test. The code between
//! the markers is copied verbatim into README.md; a test checks it still is.

use std::error::Error;

#[test]
fn readme_example_runs() -> Result<(), Box<dyn Error>> {
    // README:begin
    use ebb::dtype::Dtype;
    use ebb::record::Tape;
    use ebb::sweep::{LedgerMode, Sweep};
    use ebb::tensor::Value;
    use ebb::trace::{self, PartialRepr};

    // One training step of a 2-4-1 network that predicts how many litres a
    // plant needs from soil dryness and hours of sun, computed in f32.
    let mut tape = Tape::new("watering: one step of a 2-4-1 network", Dtype::F32);
    tape.describe("Litres of water from soil dryness and sunshine; a tanh layer, a squareplus output, mean squared error.");
    let readings = tape.input(
        "readings",
        Value::from_parts(vec![3, 2], vec![0.2, 0.9, 0.7, 0.4, 0.5, 0.5]),
    );
    let litres = tape.input("litres", Value::from_parts(vec![3, 1], vec![1.1, 1.6, 1.3]));
    let hidden = tape.scoped("model", |tape| {
        tape.scoped("hidden", |tape| {
            let w = tape.param(
                "hidden.w",
                Value::from_parts(vec![2, 4], vec![0.5, -0.3, 0.8, 0.1, -0.6, 0.4, 0.2, 0.7]),
            );
            let b = tape.param(
                "hidden.b",
                Value::from_parts(vec![4], vec![0.1, 0.0, -0.1, 0.05]),
            );
            let xw = tape.matmul(readings, w);
            let pre = tape.add(xw, b);
            tape.tanh(pre)
        })
    });
    let prediction = tape.scoped("model", |tape| {
        tape.scoped("out", |tape| {
            let w = tape.param(
                "out.w",
                Value::from_parts(vec![4, 1], vec![0.9, -0.4, 0.6, 0.3]),
            );
            let z = tape.matmul(hidden, w);
            // squareplus, (z + √(z² + 4))/2, is not in the catalog: record it as a
            // custom op with our own forward value and its partial on the input edge.
            let zs = tape.value(z).clone();
            let value = zs.map(|x| (x + (x * x + 4.0).sqrt()) / 2.0);
            let partial = zs
                .to_f64()
                .iter()
                .map(|x| (1.0 + x / (x * x + 4.0).sqrt()) / 2.0)
                .collect();
            tape.custom(
                "squareplus",
                &[z],
                value,
                vec![PartialRepr::Diagonal(partial)],
            )
        })
    })?;
    let loss = tape.scoped("loss", |tape| tape.mse(prediction, litres));
    let file = tape.finish(loss);

    // Save in any form: .ron, .json, or .tape (RON header + .safetensors sidecar).
    let path = std::env::temp_dir().join(format!("watering-{}.tape", std::process::id()));
    trace::save(&file, &path)?;

    // Open it again and sweep it: the adjoint of a param is its gradient.
    let opened = trace::load(&path)?;
    let mut sweep = Sweep::new(&opened, LedgerMode::On);
    sweep.run_to_end();
    let out_w = opened.find("out.w").expect("recorded above");
    println!(
        "d loss / d out.w = {:?}",
        sweep
            .adjoint(out_w)
            .expect("out.w reaches the loss")
            .to_f64()
    );
    assert!(sweep.flags().is_empty());
    // README:end
    std::fs::remove_file(&path)?;
    std::fs::remove_file(trace::sidecar::sidecar_path(&path))?;
    Ok(())
}

#[test]
fn readme_carries_the_example_verbatim() {
    let source = include_str!("readme_recording.rs");
    let begin = source.find("// README:begin\n").expect("begin marker") + "// README:begin\n".len();
    let end = source.find("    // README:end").expect("end marker");
    let example: String = source[begin..end]
        .lines()
        .map(|line| format!("{}\n", line.strip_prefix("    ").unwrap_or(line)))
        .collect();
    let readme = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/README.md"))
        .expect("README.md");
    assert!(
        readme.contains(&example),
        "README.md's \"Recording a trace\" example differs from tests/readme_recording.rs; copy it over:\n{example}"
    );
}
