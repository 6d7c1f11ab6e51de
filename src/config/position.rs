//! Positions in a pipeline file: byte offsets turned into 1-based line and column.

use std::fmt;

/// A 1-based line and column (columns count characters, not bytes).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub struct Position {
    /// Line, from 1.
    pub line: usize,
    /// Column, from 1.
    pub column: usize,
}

impl Position {
    /// The position of byte `offset` in `text` (clamped to the text, and to a character start).
    pub fn of(text: &str, offset: usize) -> Self {
        let mut offset = offset.min(text.len());
        while !text.is_char_boundary(offset) {
            offset -= 1;
        }
        let before = &text[..offset];
        let line_start = before.rfind('\n').map_or(0, |i| i + 1);
        Self { line: before.matches('\n').count() + 1, column: before[line_start..].chars().count() + 1 }
    }
}

impl fmt::Display for Position {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}, column {}", self.line, self.column)
    }
}

/// The nearest of `choices` to a misspelt `word`, if it is close enough to be a likely typo.
pub fn nearest<'a>(word: &str, choices: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    choices
        .into_iter()
        .map(|c| (strsim::levenshtein(word, c), c))
        .filter(|(d, c)| *d <= 3.max(c.len() / 3) || (word.len().min(c.len()) >= 3 && (c.starts_with(word) || word.starts_with(c))))
        .min()
        .map(|(_, c)| c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn positions_count_lines_and_characters() {
        let text = "a = 1\nbé = 2\n";
        assert_eq!(Position::of(text, 0), Position { line: 1, column: 1 });
        assert_eq!(Position::of(text, 6), Position { line: 2, column: 1 });
        // byte 9 follows the two-byte "é": the third character of line 2.
        assert_eq!(Position::of(text, 9), Position { line: 2, column: 3 });
        assert_eq!(Position::of(text, 999), Position { line: 3, column: 1 });
    }

    #[test]
    fn nearest_finds_typos_only() {
        assert_eq!(nearest("windw_bins", ["window_bins", "order"]), Some("window_bins"));
        assert_eq!(nearest("window", ["window_bins", "order"]), Some("window_bins"));
        assert_eq!(nearest("baseline_fit", ["ingest", "baseline"]), Some("baseline"));
        assert_eq!(nearest("zzzzzzzz", ["window_bins", "order"]), None);
    }
}
