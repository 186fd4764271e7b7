//! What panes ask of the rest of the view. A pane never changes the session
//! or another pane: it sends messages to one queue, and the app drains it
//! after each action, in order.

use super::action::PaneId;
use super::ids::{NodeIx, StepIx};
use super::work::Job;

/// One request from a pane.
#[derive(Debug, Clone, PartialEq)]
pub enum Msg {
    /// Select a node; the selection stops following the sweep.
    Select(NodeIx),
    /// Select a node from a jump, search or list: the old selection goes onto
    /// the walk history.
    Jump(NodeIx),
    /// Run (or step back) the reverse sweep until this step is the next one,
    /// keeping the selection.
    Seek(StepIx),
    /// Forward mode: run the tangent sweep up to this node, and select it.
    SeekTangent(NodeIx),
    /// A one-line message for the status line (`{key:NAME}` names a key).
    Status(String),
    /// Work for the worker.
    Request(Job),
    /// Move focus to a pane.
    Focus(PaneId),
}

/// The queue panes write to.
#[derive(Debug, Default)]
pub struct Outbox {
    messages: Vec<Msg>,
}

impl Outbox {
    /// Queues one message.
    pub fn send(&mut self, message: Msg) {
        self.messages.push(message);
    }

    /// Takes every queued message, oldest first.
    pub fn drain(&mut self) -> Vec<Msg> {
        std::mem::take(&mut self.messages)
    }

    /// True when nothing is queued.
    pub fn is_empty(&self) -> bool {
        self.messages.is_empty()
    }
}
