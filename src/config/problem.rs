//! One problem found in a pipeline file, at a byte offset, rendered with line and column.

use super::position::Position;

/// A problem at a byte offset of the pipeline text.
#[derive(Debug, Clone)]
pub struct Problem {
    /// Byte offset the problem points at.
    pub offset: usize,
    /// What is wrong, naming the stage and key where there is one.
    pub message: String,
}

impl Problem {
    /// A problem at `offset`.
    pub fn at(offset: usize, message: impl Into<String>) -> Self {
        Self { offset, message: message.into() }
    }

    /// "line L, column C: message".
    pub fn render(&self, text: &str) -> String {
        format!("{}: {}", Position::of(text, self.offset), self.message)
    }
}
