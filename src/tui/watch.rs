//! The watch prompt's conditions, a small language of our own: the sweep
//! runs until one holds after a step.
//!
//! ```text
//! condition := clause ("or" clause)*
//! clause    := atom ("and" atom)*
//! atom      := "norm" (">" | ">=" | "<" | "<=") NUMBER   ‖adjoint‖ of the node the step finished
//!            | "at" ID                                   node ID is next
//!            | "group" PREFIX                            the next node's group starts with PREFIX
//!            | "op" NAME                                 the next node's op is NAME
//!            | "nonfinite"                               an adjoint became NaN or ±inf
//! ```
//!
//! For example `norm > 1e4 or nonfinite`, `group model/layer03 and norm < 1e-8`,
//! `at demand`. Words are separated by spaces; `norm>1e4` needs none.

use crate::trace::Trace;

/// A parsed condition: clauses joined by `or`, each atoms joined by `and`.
#[derive(Debug, Clone, PartialEq)]
pub struct Condition {
    clauses: Vec<Vec<Atom>>,
}

/// One test.
#[derive(Debug, Clone, PartialEq)]
enum Atom {
    /// The finished node's adjoint norm compared with a number.
    Norm(Compare, f64),
    /// This node is next.
    At(usize),
    /// The next node's group starts with this.
    Group(String),
    /// The next node's op is this.
    Op(String),
    /// An adjoint became non-finite at this step.
    NonFinite,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Compare {
    Above,
    AtLeast,
    Below,
    AtMost,
}

/// The sweep just after one step, as a condition sees it.
#[derive(Debug, Clone, Copy)]
pub struct Moment<'a> {
    /// The trace.
    pub trace: &'a Trace,
    /// The node the step processed.
    pub done: usize,
    /// Its adjoint's norm, final now.
    pub norm: Option<f64>,
    /// The node the next step processes, if any.
    pub next: Option<usize>,
    /// Whether an adjoint became non-finite during the step.
    pub non_finite: bool,
}

/// What the prompt says when a condition does not parse.
pub const SYNTAX: &str =
    "norm > 1e4, norm < 1e-8, at ID, group PREFIX, op NAME, nonfinite; joined by and / or";

impl Condition {
    /// Parses `text`, resolving node ids in `trace`.
    pub fn parse(text: &str, trace: &Trace) -> Result<Condition, String> {
        let tokens = tokens(text);
        if tokens.is_empty() {
            return Err(format!("an empty condition (write one of: {SYNTAX})"));
        }
        let mut clauses = vec![Vec::new()];
        let mut at = 0;
        loop {
            let (atom, next) = atom(&tokens, at, trace)?;
            clauses.last_mut().expect("one clause at least").push(atom);
            match tokens.get(next).map(String::as_str) {
                None => break,
                Some("and") => at = next + 1,
                Some("or") => {
                    clauses.push(Vec::new());
                    at = next + 1;
                }
                Some(other) => {
                    return Err(format!(
                        "'{other}' where 'and', 'or' or the end was expected"
                    ));
                }
            }
        }
        Ok(Condition { clauses })
    }

    /// Whether the condition holds at `moment`.
    pub fn holds(&self, moment: &Moment) -> bool {
        self.clauses
            .iter()
            .any(|clause| clause.iter().all(|atom| atom.holds(moment)))
    }
}

impl Atom {
    fn holds(&self, moment: &Moment) -> bool {
        let next = moment.next.map(|node| moment.trace.node(node));
        match self {
            Atom::Norm(compare, bound) => moment.norm.is_some_and(|norm| match compare {
                Compare::Above => norm > *bound,
                Compare::AtLeast => norm >= *bound,
                Compare::Below => norm < *bound,
                Compare::AtMost => norm <= *bound,
            }),
            Atom::At(node) => moment.next == Some(*node),
            Atom::Group(prefix) => next.is_some_and(|node| node.group.starts_with(prefix.as_str())),
            Atom::Op(name) => next.is_some_and(|node| &*node.op_name == name.as_str()),
            Atom::NonFinite => moment.non_finite,
        }
    }
}

/// Words, with comparison signs split off wherever they stand.
fn tokens(text: &str) -> Vec<String> {
    let mut tokens = Vec::new();
    for word in text.split_whitespace() {
        let mut rest = word;
        while !rest.is_empty() {
            let sign = [">=", "<=", ">", "<"]
                .into_iter()
                .find(|sign| rest.starts_with(sign));
            if let Some(sign) = sign {
                tokens.push(sign.to_string());
                rest = &rest[sign.len()..];
                continue;
            }
            let end = rest.find(['>', '<']).unwrap_or(rest.len());
            tokens.push(rest[..end].to_string());
            rest = &rest[end..];
        }
    }
    tokens
}

/// One atom from `tokens[at..]`, and where the rest begins.
fn atom(tokens: &[String], at: usize, trace: &Trace) -> Result<(Atom, usize), String> {
    let word = tokens[at].as_str();
    let argument = |what: &str| {
        tokens
            .get(at + 1)
            .filter(|token| !matches!(token.as_str(), "and" | "or"))
            .ok_or_else(|| format!("'{word}' needs {what}"))
    };
    match word {
        "nonfinite" => Ok((Atom::NonFinite, at + 1)),
        "at" => {
            let id = argument("a node id")?;
            let node = trace
                .find(id)
                .ok_or_else(|| format!("no node has the id '{id}'"))?;
            Ok((Atom::At(node), at + 2))
        }
        "group" => Ok((
            Atom::Group(argument("a group name or prefix")?.clone()),
            at + 2,
        )),
        "op" => Ok((Atom::Op(argument("an op name")?.clone()), at + 2)),
        "norm" => {
            let compare = match argument("a comparison (>, >=, <, <=)")?.as_str() {
                ">" => Compare::Above,
                ">=" => Compare::AtLeast,
                "<" => Compare::Below,
                "<=" => Compare::AtMost,
                other => {
                    return Err(format!(
                        "'norm {other}': a comparison (>, >=, <, <=) goes after 'norm'"
                    ));
                }
            };
            let number = tokens
                .get(at + 2)
                .ok_or_else(|| "a number goes after the comparison".to_string())?;
            let bound: f64 = number
                .parse()
                .map_err(|_| format!("'{number}' is not a number (write 1e4, 0.5, 1e-8)"))?;
            Ok((Atom::Norm(compare, bound), at + 3))
        }
        other => Err(format!(
            "'{other}' is not a condition (write one of: {SYNTAX})"
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::trace::validate;

    fn moment<'a>(
        trace: &'a Trace,
        next: Option<&str>,
        norm: Option<f64>,
        non_finite: bool,
    ) -> Moment<'a> {
        Moment {
            trace,
            done: 0,
            norm,
            next: next.map(|id| trace.find(id).unwrap()),
            non_finite,
        }
    }

    #[test]
    fn conditions_parse_and_hold_as_written() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let big = Condition::parse("norm>1e4 or nonfinite", &trace).unwrap();
        assert!(big.holds(&moment(&trace, None, Some(2e4), false)));
        assert!(!big.holds(&moment(&trace, None, Some(1e4), false)));
        assert!(big.holds(&moment(&trace, None, Some(1.0), true)));
        let at = Condition::parse("at demand", &trace).unwrap();
        assert!(at.holds(&moment(&trace, Some("demand"), None, false)));
        assert!(!at.holds(&moment(&trace, Some("gross"), None, false)));
        // `and` binds before `or`.
        let mixed = Condition::parse("group dem and norm <= 0.5 or op exp", &trace).unwrap();
        assert!(mixed.holds(&moment(&trace, Some("minus_sp"), Some(0.5), false)));
        assert!(!mixed.holds(&moment(&trace, Some("minus_sp"), Some(0.6), false)));
        assert!(mixed.holds(&moment(&trace, Some("demand"), Some(9.0), false)));
        assert!(!mixed.holds(&moment(&trace, Some("profit"), Some(0.1), false)));
    }

    #[test]
    fn bad_conditions_say_what_was_expected() {
        let trace = validate(crate::demos::teaching()).unwrap();
        let error = |text: &str| Condition::parse(text, &trace).unwrap_err();
        assert!(error("").contains("empty"));
        assert!(error("at nowhere").contains("no node has the id 'nowhere'"));
        assert!(error("norm > big").contains("'big' is not a number"));
        assert!(error("norm = 3").contains("comparison"));
        assert!(error("nonfinite nonfinite").contains("'and', 'or'"));
        assert!(error("sideways").contains("is not a condition"));
        assert!(error("group").contains("needs a group"));
    }
}
