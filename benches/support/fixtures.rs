//! Big traces for the opening benchmarks, generated on the fly into a
//! temporary directory (never committed).

use ebb::dtype::Dtype;
use ebb::record::Tape;
use ebb::trace::{self, FORMAT_VERSION, NodeFile, NodeId, TraceFile, ValueRepr};
use std::path::{Path, PathBuf};

/// A recorded scalar chain of `nodes` nodes, saved as JSON at `dir/chain.json`.
pub fn scalar_chain_json(dir: &Path, nodes: usize) -> PathBuf {
    let mut tape = Tape::new("a long scalar chain", Dtype::F64);
    let scale = tape.constant("scale", 0.999);
    let mut x = tape.param("x", 0.5);
    while tape.len() + 3 <= nodes {
        let scaled = tape.mul(x, scale);
        let bent = tape.sin(scaled);
        x = tape.add(bent, x);
    }
    let path = dir.join("chain.json");
    trace::save(&tape.finish(x), &path).expect("the fixture saves");
    path
}

/// A binary-backed f32 trace of `nodes` tensor nodes of `elements` elements
/// each (a chain of `neg`s), saved at `dir/wide.tape`. Built directly as a
/// trace file: the values need not be what `neg` computes for the loader.
pub fn wide_tape(dir: &Path, nodes: usize, elements: usize) -> PathBuf {
    let tensor = |seed: usize| ValueRepr::Tensor {
        shape: vec![elements / 50, 50],
        // Exact f32 values, so the sidecar stores f32.
        data: (0..elements)
            .map(|i| ((i + seed) % 4096) as f64 / 4096.0 - 0.5)
            .collect(),
    };
    let mut file = TraceFile {
        format: FORMAT_VERSION,
        accumulate: None,
        sidecar: None,
        title: "wide tensors".into(),
        description: String::new(),
        dtype: Dtype::F32,
        output: NodeId(format!("n{}", nodes - 1)),
        seed: None,
        nodes: Vec::with_capacity(nodes),
    };
    for k in 0..nodes {
        file.nodes.push(NodeFile {
            id: NodeId(format!("n{k}")),
            dtype: None,
            op: if k == 0 { "param" } else { "neg" }.into(),
            inputs: if k == 0 {
                vec![]
            } else {
                vec![NodeId(format!("n{}", k - 1))]
            },
            group: format!("block{}", k / 100),
            site: None,
            value: tensor(k),
            attrs: Default::default(),
            partials: vec![],
            reported: None,
        });
    }
    let path = dir.join("wide.tape");
    trace::save(&file, &path).expect("the fixture saves");
    path
}
