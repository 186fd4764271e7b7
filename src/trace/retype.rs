//! A trace re-typed into another dtype, so the same recorded step can be swept
//! in f16, bf16, f32 and f64 side by side.

use super::model::{Node, Partial, Trace};
use crate::dtype::{Dtype, Subnormals};
use crate::tensor::Value;

impl Trace {
    /// A copy of this trace whose sweep computes in `dtype`, keeping or
    /// flushing subnormal results as `subnormals` says.
    ///
    /// The forward pass is not recomputed: every recorded value, recorded
    /// partial and the seed is rounded into `dtype` once, which is what a
    /// forward pass would store for a value it computed exactly. The graph,
    /// ids and sweep order are shared unchanged.
    pub fn retyped(&self, dtype: Dtype, subnormals: Subnormals) -> Trace {
        let exact = self.exact_nodes();
        let round = |value: &Value| {
            let mut value = value.clone().stored_as(dtype);
            if subnormals == Subnormals::Flush {
                value.map_in_place(|x| dtype.flush(x));
            }
            value
        };
        let nodes = self
            .nodes
            .iter()
            .enumerate()
            .map(|(position, node)| {
                if exact[position] {
                    return node.with_value(node.value.clone());
                }
                let mut retyped = node.with_value(round(&node.value));
                retyped.dtype = dtype;
                for partial in retyped.partials.iter_mut().flatten() {
                    match partial {
                        Partial::Scalar(s) => *s = dtype.round_with(*s, subnormals),
                        Partial::Diagonal(diagonal) => *diagonal = round(diagonal),
                        Partial::Jacobian { data, .. } => data
                            .iter_mut()
                            .for_each(|x| *x = dtype.round_with(*x, subnormals)),
                    }
                }
                retyped
            })
            .collect();
        let accumulate = dtype.default_accumulate();
        self.with_nodes(nodes, (dtype, accumulate), subnormals, round(&self.seed))
    }

    /// Index tensors and conditions hold whole numbers that rounding could
    /// move (f16 holds them exactly only up to 2048): re-typing leaves them
    /// as recorded. True at each node that is one.
    fn exact_nodes(&self) -> Vec<bool> {
        let mut exact = vec![false; self.nodes.len()];
        for node in &self.nodes {
            for &slot in node.op.spec().discrete {
                if let Some(&input) = node.inputs.get(slot) {
                    exact[input] = true;
                }
            }
        }
        exact
    }

    /// True when [`Trace::retyped`] into `dtype` with `subnormals` would give
    /// this trace's own arithmetic back: every node it rounds is already of
    /// `dtype`, sums already accumulate in `dtype`'s default, and subnormal
    /// results are already treated so. A sweep of this trace is then the
    /// sweep of the re-typed one (values and partials are held rounded into
    /// their node's dtype), and need not be made twice.
    pub fn is_already(&self, dtype: Dtype, subnormals: Subnormals) -> bool {
        if self.subnormals != subnormals
            || self.dtype != dtype
            || self.accumulate != dtype.default_accumulate()
        {
            return false;
        }
        let exact = self.exact_nodes();
        self.nodes
            .iter()
            .zip(&exact)
            .all(|(node, &exact)| exact || node.dtype == dtype)
            && self.seed.clone().stored_as(dtype) == self.seed
    }

    /// A copy with every node's forward value replaced, one per node in
    /// recording order, each of the node's shape (for a forward pass
    /// recomputed in another dtype).
    ///
    /// # Panics
    /// If the count or a shape differs.
    pub fn with_values(&self, values: Vec<Value>) -> Trace {
        assert_eq!(values.len(), self.nodes.len(), "one value per node");
        let nodes = self
            .nodes
            .iter()
            .zip(values)
            .map(|(node, value)| {
                assert_eq!(
                    node.value.shape(),
                    value.shape(),
                    "a replacement keeps the node's shape"
                );
                node.with_value(value)
            })
            .collect();
        self.with_nodes(
            nodes,
            (self.dtype, self.accumulate),
            self.subnormals,
            self.seed.clone(),
        )
    }

    /// This trace with other nodes (the same ids, inputs and shapes) and
    /// arithmetic: the graph and the sweep order are kept; the compact copy
    /// the sweep reads is rebuilt from the new values.
    fn with_nodes(
        &self,
        nodes: Vec<Node>,
        (dtype, accumulate): (Dtype, Dtype),
        subnormals: Subnormals,
        seed: Value,
    ) -> Trace {
        Trace {
            title: self.title.clone(),
            description: self.description.clone(),
            dtype,
            accumulate,
            rounded: self.rounded.clone(),
            subnormals,
            compact: super::compact::Compact::new(&nodes, dtype, &self.order),
            nodes,
            output: self.output,
            seed,
            index: self.index.clone(),
            graph: self.graph.clone(),
            order: self.order.clone(),
            rank: self.rank.clone(),
        }
    }
}

impl Node {
    /// A copy of this node holding `value` instead of its own (which is not copied).
    fn with_value(&self, value: Value) -> Node {
        Node {
            id: self.id.clone(),
            op: self.op,
            op_name: self.op_name.clone(),
            dtype: self.dtype,
            inputs: self.inputs.clone(),
            group: self.group.clone(),
            site: self.site.clone(),
            value,
            attrs: self.attrs.clone(),
            partials: self.partials.clone(),
            reported: self.reported.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::dtype::{Dtype, Subnormals};
    use crate::record::Tape;
    use crate::trace::Trace;

    #[test]
    fn retyping_rounds_values_and_keeps_the_graph() {
        let mut tape = Tape::new("retype", Dtype::F64);
        let x = tape.param("x", 70000.0);
        let tiny = tape.input("tiny", 1e-6);
        let y = tape.mul(x, tiny);
        let trace = Trace::try_from(tape.finish(y)).unwrap();
        let half = trace.retyped(Dtype::F16, Subnormals::Flush);
        assert_eq!(half.dtype(), Dtype::F16);
        assert_eq!(half.subnormals(), Subnormals::Flush);
        // 70000 is beyond f16's largest finite value 65504 (IEEE 754-2019 table 3.5).
        assert_eq!(half.node(0).value.as_scalar(), Some(f64::INFINITY));
        // 1e-6 is subnormal in f16 (below 2^-14), so flushing makes it zero.
        assert_eq!(half.node(1).value.as_scalar(), Some(0.0));
        assert_eq!(half.sweep_order(), trace.sweep_order());
        assert_eq!(trace.dtype(), Dtype::F64, "the original is untouched");
    }

    /// A product's partials are its inputs, so a trace recorded in f32 and one
    /// recorded in f64 and re-typed to f32 must give bit-identical adjoints,
    /// on the scalar fast path as on the general one.
    #[test]
    fn retyped_sweeps_match_a_native_recording() {
        let record = |dtype: Dtype| {
            let mut tape = Tape::new("native", dtype);
            let a = tape.param("a", 0.1);
            let b = tape.param("b", 0.3);
            let three = tape.input("three", 3.0);
            let product = tape.mul(a, b);
            let scaled = tape.mul(three, product);
            Trace::try_from(tape.finish(scaled)).unwrap()
        };
        let native = record(Dtype::F32);
        let retyped = record(Dtype::F64).retyped(Dtype::F32, Subnormals::Keep);
        let sweep = |trace: &Trace| {
            let mut sweep = crate::sweep::Sweep::new(trace, crate::sweep::LedgerMode::Off);
            sweep.run_to_end();
            (
                sweep.adjoint(0).map(std::borrow::Cow::into_owned),
                sweep.adjoint(1).map(std::borrow::Cow::into_owned),
            )
        };
        let (a, b) = sweep(&retyped);
        assert_eq!((a.clone(), b), sweep(&native));
        assert_ne!(
            a,
            Some(crate::tensor::Value::Scalar(0.9)),
            "the adjoint of a is 3·f32(0.3), not the f64 product"
        );
        // The fast path reads the compact copy: it must hold the rounded values.
        for (node, recorded) in retyped.nodes().iter().enumerate() {
            if let crate::tensor::Value::Scalar(x) = recorded.value {
                assert_eq!(
                    retyped.compact().scalars[node].to_bits(),
                    x.to_bits(),
                    "node {node}"
                );
            }
        }
    }
}
