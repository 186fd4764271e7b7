//! The recorder: a tape that Rust code drives to compute one step and record
//! it as a trace. Forward values come from the op table, the same rules the
//! engine and the checks use, rounded into the tape's dtype exactly as the
//! engine rounds them; the recorder never computes a number of its own.
//!
//! The catalog's ops are methods (in `methods.rs`); scopes set each node's group;
//! every node remembers the line of the caller's code that recorded it.

mod methods;

use crate::dtype::Dtype;
use crate::ops::{self, Attrs, Op, Precision};
use crate::tensor::Value;
use crate::trace::{FORMAT_VERSION, NodeFile, NodeId, PartialRepr, TraceFile, ValueRepr};
use std::panic::Location;

/// A handle to a recorded node.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Var(usize);

impl Var {
    /// The node's position in recording order.
    pub fn index(self) -> usize {
        self.0
    }
}

/// Why an op could not be recorded.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("cannot record {op} at {site}: {message}")]
pub struct RecordError {
    /// The op's name.
    pub op: String,
    /// Where it was called.
    pub site: String,
    /// What did not fit.
    pub message: String,
}

/// What a node carries besides its op, inputs and value.
#[derive(Debug, Clone, Default)]
struct Extras {
    attrs: Attrs,
    partials: Vec<PartialRepr>,
}

/// A recording of one step.
#[derive(Debug, Clone)]
pub struct Tape {
    title: String,
    description: String,
    dtype: Dtype,
    accumulate: Option<Dtype>,
    nodes: Vec<NodeFile>,
    values: Vec<Value>,
    /// Each recorded node's dtype.
    dtypes: Vec<Dtype>,
    scopes: Vec<String>,
}

/// Converts a value into its schema form.
pub fn value_repr(value: &Value) -> ValueRepr {
    match value {
        Value::Scalar(x) => ValueRepr::Scalar(*x),
        Value::Tensor(t) => ValueRepr::Tensor {
            shape: t.shape().to_vec(),
            data: t.to_f64().into_owned(),
        },
    }
}

fn site(location: &Location) -> String {
    format!("{}:{}", location.file(), location.line())
}

impl Tape {
    /// An empty tape computing in `dtype`.
    pub fn new(title: &str, dtype: Dtype) -> Tape {
        Tape {
            title: title.to_string(),
            description: String::new(),
            dtype,
            accumulate: None,
            nodes: Vec::new(),
            values: Vec::new(),
            dtypes: Vec::new(),
            scopes: Vec::new(),
        }
    }

    /// Sets the dtype sums accumulate in (the trace's `accumulate`); by
    /// default the tape's dtype's default ([`Dtype::default_accumulate`]).
    pub fn accumulate_in(&mut self, accumulate: Dtype) {
        self.accumulate = Some(accumulate);
    }

    /// The precision an op whose result has `dtype` computes in.
    fn precision(&self, dtype: Dtype) -> Precision {
        Precision::new(
            dtype,
            self.accumulate
                .unwrap_or_else(|| self.dtype.default_accumulate()),
        )
    }

    /// The dtype `var` was recorded in.
    pub fn dtype_of(&self, var: Var) -> Dtype {
        self.dtypes[var.0]
    }

    /// Sets the trace's description.
    pub fn describe(&mut self, description: &str) {
        self.description = description.to_string();
    }

    /// The trace's default dtype: leaves are recorded in it unless told otherwise.
    pub fn dtype(&self) -> Dtype {
        self.dtype
    }

    /// Enters a scope: nodes recorded until the matching [`Tape::pop_scope`]
    /// get the group `outer/.../name`.
    pub fn push_scope(&mut self, name: &str) {
        self.scopes.push(name.to_string());
    }

    /// Leaves the innermost scope.
    pub fn pop_scope(&mut self) {
        self.scopes.pop();
    }

    /// Records nodes inside a scope for the duration of `body`.
    pub fn scoped<T>(&mut self, name: &str, body: impl FnOnce(&mut Tape) -> T) -> T {
        self.push_scope(name);
        let result = body(self);
        self.pop_scope();
        result
    }

    /// The recorded forward value of `var`.
    pub fn value(&self, var: Var) -> &Value {
        &self.values[var.0]
    }

    /// The id `var` was recorded under.
    pub fn id(&self, var: Var) -> &str {
        &self.nodes[var.0].id.0
    }

    /// Gives `var` a readable id in place of the generated one. Consumers
    /// recorded after this see the new id; earlier references are updated.
    pub fn rename(&mut self, var: Var, id: &str) -> Var {
        let old = std::mem::replace(&mut self.nodes[var.0].id, NodeId(id.to_string()));
        for node in &mut self.nodes[var.0 + 1..] {
            for input in &mut node.inputs {
                if *input == old {
                    *input = NodeId(id.to_string());
                }
            }
        }
        var
    }

    /// Number of nodes recorded.
    pub fn len(&self) -> usize {
        self.nodes.len()
    }

    /// True before anything is recorded.
    pub fn is_empty(&self) -> bool {
        self.nodes.is_empty()
    }

    #[allow(clippy::too_many_arguments)]
    fn push(
        &mut self,
        id: Option<&str>,
        op: &str,
        inputs: &[Var],
        value: Value,
        dtype: Dtype,
        extras: Extras,
        location: &Location,
    ) -> Var {
        let Extras { attrs, partials } = extras;
        let index = self.nodes.len();
        let id = id.map_or_else(|| format!("{op}_{index}"), str::to_string);
        let value = value.stored_as(dtype);
        self.dtypes.push(dtype);
        self.nodes.push(NodeFile {
            id: NodeId(id),
            op: op.to_string(),
            dtype: (dtype != self.dtype).then_some(dtype),
            inputs: inputs
                .iter()
                .map(|input| self.nodes[input.0].id.clone())
                .collect(),
            group: self.scopes.join("/"),
            site: Some(site(location)),
            value: value_repr(&value),
            attrs: attrs.into(),
            partials,
            reported: None,
        });
        self.values.push(value);
        Var(index)
    }

    fn leaf(&mut self, op: Op, name: &str, value: Value, dtype: Dtype, location: &Location) -> Var {
        let value = value.map(|x| dtype.round(x));
        self.push(
            Some(name),
            op.name(),
            &[],
            value,
            dtype,
            Extras::default(),
            location,
        )
    }

    /// Records data fed to the step, stored in `dtype` rather than the tape's.
    #[track_caller]
    pub fn input_in(&mut self, name: &str, value: impl Into<Value>, dtype: Dtype) -> Var {
        self.leaf(Op::Input, name, value.into(), dtype, Location::caller())
    }

    /// Records a trainable parameter stored in `dtype` rather than the tape's
    /// (f32 master weights in a half-precision step, say).
    #[track_caller]
    pub fn param_in(&mut self, name: &str, value: impl Into<Value>, dtype: Dtype) -> Var {
        self.leaf(Op::Param, name, value.into(), dtype, Location::caller())
    }

    /// Records a conversion of `x` into `dtype` (its value rounded once; its
    /// derivative the identity, each contribution rounded into `x`'s dtype).
    #[track_caller]
    pub fn cast(&mut self, x: Var, dtype: Dtype) -> Var {
        let location = Location::caller();
        let value = ops::forward(
            Op::Cast,
            &[&self.values[x.0]],
            &Attrs::default(),
            self.precision(dtype),
        );
        self.push(
            None,
            Op::Cast.name(),
            &[x],
            value,
            dtype,
            Extras::default(),
            location,
        )
    }

    /// Records data fed to the step.
    #[track_caller]
    pub fn input(&mut self, name: &str, value: impl Into<Value>) -> Var {
        self.leaf(
            Op::Input,
            name,
            value.into(),
            self.dtype,
            Location::caller(),
        )
    }

    /// Records a trainable parameter.
    #[track_caller]
    pub fn param(&mut self, name: &str, value: impl Into<Value>) -> Var {
        self.leaf(
            Op::Param,
            name,
            value.into(),
            self.dtype,
            Location::caller(),
        )
    }

    /// Records a constant.
    #[track_caller]
    pub fn constant(&mut self, name: &str, value: impl Into<Value>) -> Var {
        self.leaf(
            Op::Const,
            name,
            value.into(),
            self.dtype,
            Location::caller(),
        )
    }

    /// Records an index tensor (the indices of gather or embedding, the
    /// targets of nll_loss): an input holding whole numbers, stored in f64
    /// whatever the tape's dtype (f16 holds whole numbers exactly only up to
    /// 2048). The ops that read it check its range; the ops' own dtype does
    /// not follow it.
    #[track_caller]
    pub fn indices(&mut self, name: &str, value: impl Into<Value>) -> Var {
        self.leaf(
            Op::Input,
            name,
            value.into(),
            Dtype::F64,
            Location::caller(),
        )
    }

    /// Records a catalog op, computing its value with the op table.
    #[track_caller]
    pub fn apply(&mut self, op: Op, inputs: &[Var], attrs: Attrs) -> Result<Var, RecordError> {
        self.apply_at(op, inputs, attrs, Location::caller())
    }

    /// Records a catalog op, panicking with the caller's site when it does not fit.
    fn op_at(
        &mut self,
        op: Op,
        inputs: &[Var],
        attrs: Attrs,
        location: &'static Location<'static>,
    ) -> Var {
        self.apply_at(op, inputs, attrs, location)
            .unwrap_or_else(|error| panic!("{error}"))
    }

    fn apply_at(
        &mut self,
        op: Op,
        inputs: &[Var],
        attrs: Attrs,
        location: &Location,
    ) -> Result<Var, RecordError> {
        let error = |message: String| RecordError {
            op: op.name().to_string(),
            site: site(location),
            message,
        };
        if op.is_leaf() || op == Op::Custom || op == Op::Cast {
            return Err(error(
                "use input, param, constant or custom to record this node".to_string(),
            ));
        }
        let spec = op.spec();
        if !spec.arity.accepts(inputs.len()) {
            return Err(error(format!("takes {}, got {}", spec.arity, inputs.len())));
        }
        if let Some(missing) = spec.required.iter().find(|attr| !attr.is_set(&attrs)) {
            return Err(error(format!("needs the attribute `{}`", missing.as_str())));
        }
        let values: Vec<&Value> = inputs.iter().map(|input| &self.values[input.0]).collect();
        let shapes: Vec<&[usize]> = values.iter().map(|value| value.shape()).collect();
        ops::infer_shape(op, &shapes, &attrs).map_err(error)?;
        ops::check_inputs(op, &values, &attrs).map_err(|misfit| error(misfit.message))?;
        // Mixed inputs compute in their promoted dtype, as frameworks do;
        // index tensors and conditions do not take part.
        let dtype = inputs
            .iter()
            .enumerate()
            .filter(|(slot, _)| !spec.discrete.contains(slot))
            .map(|(_, input)| self.dtypes[input.0])
            .reduce(Dtype::promote)
            .unwrap_or(self.dtype);
        let value = ops::forward(op, &values, &attrs, self.precision(dtype));
        Ok(self.push(
            None,
            op.name(),
            inputs,
            value,
            dtype,
            Extras {
                attrs,
                partials: Vec::new(),
            },
            location,
        ))
    }

    /// Records an op outside the catalog, with the forward value and the
    /// partial on every input edge computed by the caller.
    #[track_caller]
    pub fn custom(
        &mut self,
        name: &str,
        inputs: &[Var],
        value: impl Into<Value>,
        partials: Vec<PartialRepr>,
    ) -> Result<Var, RecordError> {
        let location = Location::caller();
        if Op::from_name(name).is_some() {
            return Err(RecordError {
                op: name.to_string(),
                site: site(location),
                message: "is a catalog op; use apply".to_string(),
            });
        }
        if partials.len() != inputs.len() || partials.contains(&PartialRepr::Absent) {
            return Err(RecordError {
                op: name.to_string(),
                site: site(location),
                message: "a custom op needs a partial on every input edge".to_string(),
            });
        }
        let dtype = inputs
            .iter()
            .map(|input| self.dtypes[input.0])
            .reduce(Dtype::promote)
            .unwrap_or(self.dtype);
        let value = value.into().map(|x| dtype.round(x));
        Ok(self.push(
            None,
            name,
            inputs,
            value,
            dtype,
            Extras {
                attrs: Attrs::default(),
                partials,
            },
            location,
        ))
    }

    /// Attaches the gradient the original framework reported for `var`, so
    /// that checks can compare it with Ebb's sweep. Rounded into the dtype.
    pub fn report(&mut self, var: Var, gradient: impl Into<Value>) {
        let dtype = self.dtypes[var.0];
        let gradient = gradient.into().map(|x| dtype.round(x));
        self.nodes[var.0].reported = Some(value_repr(&gradient));
    }

    /// Finishes the recording with `output` as the seeded node and the
    /// default seed (1, or ones of the output's shape).
    pub fn finish(self, output: Var) -> TraceFile {
        self.finish_with_seed(output, None)
    }

    /// Finishes the recording with `output` seeded by `seed` (a scalar, or a
    /// tensor of the output's shape): the vector of a vector-Jacobian product.
    pub fn finish_seeded(self, output: Var, seed: impl Into<Value>) -> TraceFile {
        let dtype = self.dtypes[output.0];
        let seed = seed.into().map(|x| dtype.round(x));
        self.finish_with_seed(output, Some(value_repr(&seed)))
    }

    fn finish_with_seed(self, output: Var, seed: Option<ValueRepr>) -> TraceFile {
        TraceFile {
            format: FORMAT_VERSION,
            title: self.title,
            description: self.description,
            dtype: self.dtype,
            accumulate: self.accumulate,
            sidecar: None,
            output: self.nodes[output.0].id.clone(),
            seed,
            nodes: self.nodes,
        }
    }
}
