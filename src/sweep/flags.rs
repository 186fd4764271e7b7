//! Flags raised during the sweep: where a non-finite number first appeared.

use crate::tensor::Value;

/// What a flag reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagKind {
    /// The node's recorded forward value holds NaN or ±inf.
    NonFiniteValue,
    /// The local partial on one of the node's input edges holds NaN or ±inf.
    NonFinitePartial,
    /// The node's adjoint became NaN or ±inf (it was finite before).
    NonFiniteAdjoint,
}

impl FlagKind {
    /// A short name for reports.
    pub fn name(self) -> &'static str {
        match self {
            FlagKind::NonFiniteValue => "non-finite value",
            FlagKind::NonFinitePartial => "non-finite partial",
            FlagKind::NonFiniteAdjoint => "non-finite adjoint",
        }
    }
}

/// One flag: the node, the step that raised it, and the offending number.
#[derive(Debug, Clone, PartialEq)]
pub struct Flag {
    /// The sweep step (0-based) during which it was raised.
    pub step: usize,
    /// The flagged node.
    pub node: usize,
    /// What was found.
    pub kind: FlagKind,
    /// For a partial, the input slot of the edge; for an adjoint, the slot
    /// through which the contribution arrived.
    pub slot: Option<usize>,
    /// For an adjoint, the consumer whose contribution made it non-finite.
    pub from: Option<usize>,
    /// The first offending element's flat index and value.
    pub element: usize,
    /// The first offending value.
    pub value: f64,
    /// How many elements are non-finite.
    pub count: usize,
}

impl Flag {
    /// A flag for a value with non-finite elements, or `None` if it is finite.
    pub(super) fn for_value(
        step: usize,
        node: usize,
        kind: FlagKind,
        value: &Value,
    ) -> Option<Flag> {
        let (element, bad) = value.first_non_finite()?;
        let count = value.elements().count_non_finite();
        Some(Flag {
            step,
            node,
            kind,
            slot: None,
            from: None,
            element,
            value: bad,
            count,
        })
    }

    /// A flag for the non-finite partial `value` on input edge `slot` of `node`.
    pub(super) fn partial(step: usize, node: usize, slot: usize, value: f64) -> Flag {
        Flag {
            step,
            node,
            kind: FlagKind::NonFinitePartial,
            slot: Some(slot),
            from: None,
            element: 0,
            value,
            count: 1,
        }
    }

    /// A flag for `input`'s adjoint made non-finite, `after`, by the
    /// contribution `consumer` sent through input slot `slot`; `None` if it is finite.
    pub(super) fn adjoint(
        step: usize,
        consumer: usize,
        slot: usize,
        input: usize,
        after: &Value,
    ) -> Option<Flag> {
        let mut flag = Flag::for_value(step, input, FlagKind::NonFiniteAdjoint, after)?;
        flag.slot = Some(slot);
        flag.from = Some(consumer);
        Some(flag)
    }
}
